"""A document's steps in order, in one process: what a warm worker runs.

The parent (execute.BatchRunner) sends a document's input and the steps of a segment;
`run_segment` runs them one after the other in the worker and yields each step's
units as soon as they are ready, so the parent stores rows while the next step runs.
Before each step it yields a Clock with that step's time limit: the parent times each
step from its own start. A document whose inputs are stored is read here first
(flows/inputs.py). No Prefect here; the store only to read inputs.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Callable

from thresher.flows.encodings import get_encoding
from thresher.flows.inputs import ReadFrom, StoredInputs, order_key, resolve
from thresher.flows.isolate import Clock
from thresher.flows.rows import unit_id
from thresher.steps.spec import StepContext, StepParams
from thresher.steps.units import DOCUMENT_LOCATOR, Chunk, DocChunks, Page, Source, clear_stale_count

Unit = Page | Chunk


@dataclass
class StepCall:
    """One step as a worker needs it."""

    index: int
    name: str
    produces: str  # "pages" | "chunks"
    run: Callable[..., list] | None  # None for a barrier
    params: StepParams
    formats: frozenset[str]
    limit: float | None
    # A corpus step limited to `formats`: the document goes on past it only when none
    # of its units is of those formats (then the step passes it by, as it passes by
    # any document of other formats); otherwise it stops here for the corpus step.
    barrier: bool = False
    # The sketch of an incremental corpus step (steps/incremental.py) that comes right
    # after the segment: `run` is the step's sketch, made here on the chunks the segment
    # just made, so that the corpus step, serial in the flow's process, need not.
    sketch: bool = False


@dataclass
class StepDone:
    """One step's output for the document."""

    index: int
    units: list
    started: datetime
    ms: float
    paused: bool = False  # the worker stopped here so the parent can act first


@dataclass
class Sketched:
    """A sketch call's table for the document (doc_id, chunk_id, chunk_index and the
    step's sketch columns, one row per ok chunk)."""

    index: int
    table: Any


# The clock tag of a sketch call: a worker lost while sketching costs the document
# nothing, as the corpus step then sketches it itself.
SKETCH_TAG = "sketch"


@dataclass
class PassedOn:
    """Sent when a document went on past a corpus step that passes it by (a barrier
    call): its later steps run now, so the segment after that step leaves it out."""

    index: int


def failed_document_unit(kind: str, reason: str, exc: BaseException | None, parents: list[str]) -> Unit:
    unit: Unit = Page(locator=DOCUMENT_LOCATOR) if kind == "pages" else Chunk(locator=DOCUMENT_LOCATOR)
    unit.parents = parents
    unit.fail(reason, exc)
    return unit


def call_here(name: str, kind: str, run: Callable[..., list], params: StepParams, inputs: Any,
              ctx: StepContext) -> list[Unit]:
    """Run one step for one document in this process; an exception fails the document's units."""
    parents = [] if isinstance(inputs, Source) else [u.locator for u in inputs]
    try:
        out = run(inputs, params, ctx)
        if not isinstance(out, list):
            raise TypeError(f"step {name} returned {type(out).__name__}, expected a list of units")
        return out
    except Exception as exc:  # noqa: BLE001 - a bad document is data, not a crash
        return [failed_document_unit(kind, f"{name} failed: {type(exc).__name__}: {exc}", exc, parents)]


def sketch_here(call: StepCall, chunks: list, doc_id: str, source_path: str) -> Any:
    """The sketch of one document's ok chunks, or None when there is none to give: the
    corpus step then sketches the document itself, and meets any error there."""
    if not chunks or not all(isinstance(u, Chunk) for u in chunks):
        return None
    # A sketch reads the document's id and chunks only (IncrementalCorpusSpec), so
    # rank and modification time, which the worker does not know, are left at 0.
    ctx = StepContext(doc_id=doc_id, source_path=source_path, encoding=get_encoding)
    try:
        return call.run([DocChunks(doc_id, source_path, 0, chunks)], call.params, ctx)
    except Exception:  # noqa: BLE001 - not this document's failure: the corpus step retries it
        return None


def as_next_inputs(units: list) -> None:
    """Units handed to the next step lose what belonged to the step before: its time
    (duration_ms) and its payload, as when they are read back from the store
    (rows.row_to_page)."""
    for u in units:
        u.duration_ms = None
        u.payload = {}


def passes_by(call: StepCall, units: Any) -> bool:
    """A format-limited step writes nothing for a document of other formats."""
    return call.index > 0 and bool(call.formats) and not any(u.format in call.formats for u in units)


def run_segment(calls: list[StepCall], inputs: Any, doc_id: str, source_path: str, pause_first: bool):
    """Yield Clock, StepDone, Clock, StepDone... for the steps in `calls`.

    The worker stops after the first step when `pause_first` (a re-run of chosen units:
    the parent merges them with the stored ones) or when extraction found documents
    inside the document (the parent runs those first, as their own documents).
    `inputs` may be StoredInputs: then they are read here first (a ReadFrom says from
    which stage), and a document with no ok unit there runs no step. A barrier call
    (a format-limited corpus step) ends the document's run here unless the step passes
    it by; then a PassedOn says so and the steps after it run."""
    if isinstance(inputs, StoredInputs):
        loaded = resolve(inputs)
        if loaded is None or not loaded.units:
            return
        yield ReadFrom(loaded.stage, [u.locator for u in loaded.units])
        inputs = loaded.units
    for k, call in enumerate(calls):
        if call.sketch:
            if not passes_by(call, inputs):
                yield Clock(None, SKETCH_TAG)
                table = sketch_here(call, inputs, doc_id, source_path)
                if table is not None:
                    yield Sketched(call.index, table)
            return
        if call.barrier:
            if not passes_by(call, inputs):
                return  # the corpus step decides about this document first
            yield PassedOn(call.index)
            continue
        if passes_by(call, inputs):
            continue
        if call.index > 0:
            as_next_inputs(inputs)
        ctx = StepContext(doc_id=doc_id, source_path=source_path, encoding=get_encoding)
        yield Clock(call.limit, call.index)
        started = datetime.now(timezone.utc)
        t0 = time.perf_counter()
        out = call_here(call.name, call.produces, call.run, call.params, inputs, ctx)
        ms = (time.perf_counter() - t0) * 1000.0
        if call.produces == "chunks":
            came_from = {u.locator: u for u in inputs if isinstance(u, Chunk)} if call.index > 0 else {}
            for u in out:  # named where born, as the stored row names it (rows.chunk_row)
                u.chunk_id = u.chunk_id or unit_id(doc_id, call.name, u.locator)
                if len(u.parents) == 1:
                    clear_stale_count(came_from.get(u.parents[0]), u)
        members = call.index == 0 and any(isinstance(u, Page) and u.members for u in out)
        paused = k == 0 and (pause_first or members) and k + 1 < len(calls) and not calls[k + 1].sketch
        yield StepDone(call.index, out, started, ms, paused)
        if paused:
            return
        inputs = sorted((u for u in out if u.ok), key=order_key)
        if not inputs:
            return
