"""A document's steps in order, in one process: what a warm worker runs.

The parent (execute.BatchRunner) sends a document's input and the steps of a segment;
`run_segment` runs them one after the other in the worker and yields each step's
rows as soon as they are ready (made here, as an Arrow table: the parent, one process
for every worker, only stores them), so the parent stores them while the next step runs.
The units themselves go to the parent only where it acts on them before the next step
(a re-run of chosen units, documents found inside a document).
Before each step it yields a Clock with that step's time limit: the parent times each
step from its own start. A document whose inputs are stored is read here first
(flows/inputs.py). No Prefect here; the store only to read inputs.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Callable

import pyarrow as pa

from thresher.flows.encodings import get_encoding
from thresher.flows.inputs import ReadFrom, StoredInputs, order_key, resolve
from thresher.flows.isolate import Clock
from thresher.flows.rows import RowContext, rows_to_table, to_row, unit_id
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
    version: str = ""  # the step's version and config digest, for its rows
    digest: str = ""


@dataclass
class StepRows:
    """A step's rows for the document, made where it ran, and what the parent needs of
    its units besides: how many of each status, why any failed, and the ok units'
    locators (the parents of a failure the next step may record)."""

    table: pa.Table
    counts: dict[str, int]
    failures: list[str]
    ok_locators: list[str]


@dataclass
class StepDone:
    """One step's output for the document: its rows, or its units where the parent acts
    on them first (the worker's first step on a re-run of chosen units, or documents
    found inside the document)."""

    index: int
    units: list
    started: datetime
    ms: float
    paused: bool = False  # the worker stopped here so the parent can act first
    rows: StepRows | None = None


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


def rows_for(step: str, ctx: RowContext, units: list[Unit]) -> list[dict[str, Any]]:
    """The units' stage rows; units the table cannot hold fail the document instead (the
    list of units is then that one failure)."""
    try:
        rows = [to_row(ctx, u) for u in units]
    except Exception as exc:  # noqa: BLE001 - e.g. a payload the table has no column for
        failed = failed_document_unit(ctx.unit, f"{step} output could not be stored: {exc}", exc,
                                      [p for u in units for p in u.parents])
        rows = [to_row(ctx, failed)]
        units[:] = [failed]
    for row in rows[1:]:
        row["document_ms"] = None  # the document's time once, so a sum over rows is real time
    if ctx.unit == "chunks":
        for unit, row in zip(units, rows):
            unit.chunk_id = row["chunk_id"]
    return rows


def table_for(step: str, ctx: RowContext, units: list[Unit]) -> pa.Table:
    """rows_for as a stage table; a value the table's types cannot hold fails the
    document alone (not the batch whose part it would have been written in)."""
    rows = rows_for(step, ctx, units)
    try:
        return rows_to_table(step, ctx.unit, rows)
    except (pa.ArrowException, TypeError, ValueError, OverflowError) as exc:
        failed = failed_document_unit(ctx.unit, f"{step} output could not be stored: {type(exc).__name__}: {exc}",
                                      exc, [p for u in units for p in u.parents])
        units[:] = [failed]
        return rows_to_table(step, ctx.unit, rows_for(step, ctx, units))


def step_rows(call: StepCall, run_id: str, doc_id: str, source_path: str, prev: str | None,
              started: datetime, ms: float, units: list[Unit]) -> StepRows:
    """The step's rows as the parent would make them, with attempt 1 throughout (the
    parent knows the attempts stored before and sets them: BatchRunner._take_rows)."""
    ctx = RowContext(run_id, doc_id, source_path, call.name, call.version, call.digest, call.produces, prev,
                     started, round(ms, 3), {})
    table = table_for(call.name, ctx, units)
    counts: dict[str, int] = {}
    for u in units:
        counts[u.status] = counts.get(u.status, 0) + 1
    return StepRows(table, counts, [u.reason for u in units if u.status == "failed"],
                    [u.locator for u in sorted((u for u in units if u.ok), key=order_key)])


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


def passes_by(call: StepCall, units: Any) -> bool:
    """A format-limited step writes nothing for a document of other formats."""
    return call.index > 0 and bool(call.formats) and not any(u.format in call.formats for u in units)


def run_segment(calls: list[StepCall], inputs: Any, doc_id: str, source_path: str, pause_first: bool,
                run_id: str, prev: str | None):
    """Yield Clock, StepDone, Clock, StepDone... for the steps in `calls`.

    `prev`: the stage `inputs` came from (None for a source file or stored inputs).

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
        inputs, prev = loaded.units, loaded.stage
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
            for u in inputs:  # a time the previous step measured is not this step's
                u.duration_ms = None
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
        if (k == 0 and pause_first) or members:
            yield StepDone(call.index, out, started, ms, paused)  # the parent acts on the units first
        else:
            # (Rows the table cannot hold leave `out` that one failure: no step goes on.)
            yield StepDone(call.index, [], started, ms, paused,
                           step_rows(call, run_id, doc_id, source_path, prev, started, ms, out))
        if paused:
            return
        prev = call.name
        inputs = sorted((u for u in out if u.ok), key=order_key)
        if not inputs:
            return
