"""Running steps over documents and writing what they decide. No Prefect here.

A batch runs a segment of the chain (consecutive document-scope steps) for a few
documents and writes one Parquet part per stage. A corpus step runs once over every
live document and writes rows only where its decision is new or changed.
"""

from __future__ import annotations

import time
from collections import defaultdict
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pyarrow as pa

from thresher.flows.config import FlowDefinition, ResolvedStep
from thresher.flows.encodings import get_encoding
from thresher.flows.rows import RowContext, row_to_unit, rows_to_table, to_row
from thresher.flows.store import Store
from thresher.steps.spec import StepContext
from thresher.steps.units import DOCUMENT_LOCATOR, OK, Chunk, DocChunks, Page, Source


@dataclass
class DocJob:
    doc_id: str
    source_path: str
    abs_path: str
    size: int
    mtime: float
    start: int  # index of the first step to run for this document
    known: bool  # the store may already hold rows of this document


@dataclass
class BatchJob:
    run_id: str
    store_root: str
    segment: list[int]  # step indices, consecutive document-scope steps
    part: str
    docs: list[DocJob]


@dataclass
class BatchResult:
    part: str
    documents: int = 0
    counts: dict[str, dict[str, int]] = field(default_factory=dict)  # stage -> status -> n
    step_seconds: float = 0.0
    seconds: float = 0.0
    failures: list[tuple[str, str, str]] = field(default_factory=list)  # path, stage, reason


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _unit_kind(step: ResolvedStep) -> str:
    return step.spec.produces


def _order_key(unit: Page | Chunk) -> tuple:
    if isinstance(unit, Chunk):
        return (unit.index, unit.locator)
    return (unit.page or 0, unit.locator)


def load_units(store: Store, step: ResolvedStep, doc_ids: list[str], run_id: str) -> dict[str, list[Page | Chunk]]:
    """The ok units of a stage's current view, per document, in document order."""
    table = store.current(step.name, _unit_kind(step), doc_ids, include_run=run_id)
    out: dict[str, list[Page | Chunk]] = defaultdict(list)
    for row in table.to_pylist():
        if row["status"] == OK:
            out[row["doc_id"]].append(row_to_unit(step.name, _unit_kind(step), row))
    for units in out.values():
        units.sort(key=_order_key)
    return out


def _failed_document_unit(kind: str, reason: str, exc: BaseException, parents: list[str]) -> Page | Chunk:
    unit: Page | Chunk = Page(locator=DOCUMENT_LOCATOR) if kind == "pages" else Chunk(locator=DOCUMENT_LOCATOR)
    unit.parents = parents
    unit.fail(reason, exc)
    return unit


def _call_step(step: ResolvedStep, inputs: Any, ctx: StepContext) -> list[Page | Chunk]:
    """Run one step for one document; a raised exception fails the document's units."""
    try:
        out = step.spec.run(inputs, step.params, ctx)
        if not isinstance(out, list):
            raise TypeError(f"step {step.name} returned {type(out).__name__}, expected a list of units")
        return out
    except Exception as exc:  # noqa: BLE001 - a bad document is data, not a crash
        parents = [] if isinstance(inputs, Source) else [u.locator for u in inputs]
        reason = f"{step.name} failed: {type(exc).__name__}: {exc}"
        return [_failed_document_unit(_unit_kind(step), reason, exc, parents)]


def _rows_for(step: ResolvedStep, ctx: RowContext, units: list[Page | Chunk]) -> list[dict[str, Any]]:
    try:
        rows = [to_row(ctx, u) for u in units]
    except Exception as exc:  # noqa: BLE001 - e.g. a payload the table has no column for
        failed = _failed_document_unit(ctx.unit, f"{step.name} output could not be stored: {exc}", exc,
                                       [p for u in units for p in u.parents])
        rows = [to_row(ctx, failed)]
        units[:] = [failed]
    if ctx.unit == "chunks":
        for unit, row in zip(units, rows):
            unit.chunk_id = row["chunk_id"]
    return rows


class BatchRunner:
    """Runs one segment of the chain for a batch of documents."""

    def __init__(self, definition: FlowDefinition, store: Store, run_id: str):
        self.definition = definition
        self.store = store
        self.run_id = run_id

    def run(self, job: BatchJob) -> BatchResult:
        t0 = time.perf_counter()
        result = BatchResult(part=job.part, documents=len(job.docs))
        rows: dict[str, list[dict[str, Any]]] = defaultdict(list)
        writes: dict[str, list[tuple[str, str]]] = defaultdict(list)
        steps = self.definition.steps
        # Documents that start past the segment's first step read their input from the store.
        by_start: dict[int, list[DocJob]] = defaultdict(list)
        for doc in job.docs:
            by_start[max(doc.start, job.segment[0])].append(doc)
        stored_inputs: dict[str, list[Page | Chunk]] = {}
        for start, docs in by_start.items():
            if start > 0:
                stored_inputs.update(load_units(self.store, steps[start - 1], [d.doc_id for d in docs], self.run_id))
        for doc in job.docs:
            start = max(doc.start, job.segment[0])
            self._run_document(doc, [i for i in job.segment if i >= start], stored_inputs.get(doc.doc_id, []),
                               rows, writes, result)
        for stage, stage_rows in rows.items():
            unit = _unit_kind(self.definition.step(stage))
            self.store.write_stage_part(stage, self.run_id, job.part, rows_to_table(stage, unit, stage_rows),
                                        writes[stage])
        result.seconds = time.perf_counter() - t0
        return result

    def _run_document(self, doc: DocJob, indices: list[int], stored: list[Page | Chunk],
                      rows: dict[str, list[dict[str, Any]]], writes: dict[str, list[tuple[str, str]]],
                      result: BatchResult) -> None:
        steps = self.definition.steps
        if not indices:
            return
        first = indices[0]
        prev = steps[first - 1].name if first > 0 else None
        if first == 0:
            spec, params = steps[0].spec, steps[0].params
            limit = spec.source_limit(params) if spec.source_limit else None
            try:
                data = b"" if limit is not None and doc.size > limit else Path(doc.abs_path).read_bytes()
            except OSError as exc:  # moved, deleted or locked since the scan: this file only
                failed = _failed_document_unit("pages", f"cannot read file: {exc.strerror or exc}", exc, [])
                self._record(doc, steps[0], None, [failed], _now(), 0.0, rows, writes, result)
                return
            inputs: Any = Source(doc.doc_id, doc.source_path, data, doc.size, doc.mtime)
        else:
            inputs = stored
            if not inputs:
                return  # nothing upstream is ok: the trail ends at the earlier stage
        for i in indices:
            step = steps[i]
            ctx = StepContext(doc_id=doc.doc_id, source_path=doc.source_path, encoding=get_encoding)
            started = _now()
            t0 = time.perf_counter()
            out = _call_step(step, inputs, ctx)
            ms = (time.perf_counter() - t0) * 1000.0
            self._record(doc, step, prev, out, started, ms, rows, writes, result)
            inputs = sorted((u for u in out if u.ok), key=_order_key)
            if not inputs:
                return
            prev = step.name

    def _record(self, doc: DocJob, step: ResolvedStep, prev: str | None, out: list[Page | Chunk],
                started: datetime, ms: float, rows: dict[str, list[dict[str, Any]]],
                writes: dict[str, list[tuple[str, str]]], result: BatchResult) -> None:
        """Turn one step's units for one document into rows, and count them."""
        kind = _unit_kind(step)
        attempts = self.store.max_attempts(step.name, kind, [doc.doc_id]) if doc.known else {}
        result.step_seconds += ms / 1000.0
        rctx = RowContext(self.run_id, doc.doc_id, doc.source_path, step.name, step.spec.version,
                          step.digest, kind, prev, started, round(ms, 3), attempts)
        rows[step.name].extend(_rows_for(step, rctx, out))
        writes[step.name].append((doc.doc_id, "document"))
        counts = result.counts.setdefault(step.name, {})
        for u in out:
            counts[u.status] = counts.get(u.status, 0) + 1
            if u.status == "failed":
                result.failures.append((doc.source_path, step.name, u.reason))


@dataclass
class CorpusResult:
    stage: str
    affected_docs: set[str]
    counts: dict[str, int]
    rows_written: int
    seconds: float


def _decision(row: dict[str, Any], payload_names: list[str]) -> tuple:
    return (row["status"], row.get("reason")) + tuple(
        tuple(sorted(v.items())) if isinstance(v, dict) else (tuple(v) if isinstance(v, list) else v)
        for v in (row.get(n) for n in payload_names)
    )


def run_corpus_step(definition: FlowDefinition, store: Store, run_id: str, index: int,
                    live_docs: dict[str, tuple[int, str]], rewrite_docs: set[str]) -> CorpusResult:
    """Run the corpus-wide step at `index` over all live documents.

    live_docs maps doc_id -> (rank, source path). Documents in rewrite_docs get every
    unit written (their input changed this run); for the rest only units whose
    decision changed are written, so unchanged weeks write next to nothing.
    """
    from thresher.flows import schema

    t0 = time.perf_counter()
    step = definition.steps[index]
    prev = definition.steps[index - 1]
    inputs = load_units(store, prev, sorted(live_docs), run_id)
    docs = [DocChunks(doc_id=d, source_path=live_docs[d][1], rank=live_docs[d][0], chunks=list(units))
            for d, units in inputs.items() if d in live_docs]
    docs.sort(key=lambda d: (d.rank, d.source_path))
    ctx = StepContext(encoding=get_encoding)
    started = _now()
    out = step.spec.run(docs, step.params, ctx)
    ms = (time.perf_counter() - t0) * 1000.0

    chunk_doc = {c.chunk_id: d.doc_id for d in docs for c in d.chunks}
    by_doc: dict[str, list[Chunk]] = defaultdict(list)
    for chunk in out:
        by_doc[chunk_doc[chunk.chunk_id]].append(chunk)

    current = store.current(step.name, "chunks", sorted(live_docs), include_run=run_id)
    payload_names = [f.name for f in schema.payload_fields(step.name, "chunks")]
    before = {r["unit_id"]: _decision(r, payload_names) for r in current.to_pylist()}
    attempts = store.max_attempts(step.name, "chunks", sorted(by_doc))

    all_rows: list[dict[str, Any]] = []
    writes: list[tuple[str, str]] = []
    affected: set[str] = set()
    counts: dict[str, int] = {}
    for doc_id, chunks in sorted(by_doc.items()):
        rctx = RowContext(run_id, doc_id, live_docs[doc_id][1], step.name, step.spec.version, step.digest,
                          "chunks", prev.name, started, round(ms, 3), attempts)
        rows = [to_row(rctx, c) for c in chunks]
        for c in chunks:
            counts[c.status] = counts.get(c.status, 0) + 1
        if doc_id in rewrite_docs:
            all_rows.extend(rows)
            writes.append((doc_id, "document"))
            affected.add(doc_id)
            continue
        changed = [r for r in rows if before.get(r["unit_id"]) != _decision(r, payload_names)]
        if changed:
            all_rows.extend(changed)
            writes.append((doc_id, "units"))
            affected.add(doc_id)
    if all_rows:
        store.write_stage_part(step.name, run_id, "corpus", rows_to_table(step.name, "chunks", all_rows), writes)
    return CorpusResult(step.name, affected, counts, len(all_rows), time.perf_counter() - t0)

