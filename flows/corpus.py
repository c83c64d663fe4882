"""Running a corpus-wide step (one that needs every live document at once).

A corpus step runs once per run over every live document and writes rows only where
its decision is new or changed, so an unchanged week writes next to nothing.
"""

from __future__ import annotations

import time
from collections import defaultdict
from dataclasses import dataclass
from typing import Any

from thresher.flows import schema
from thresher.flows.config import FlowDefinition
from thresher.flows.encodings import get_encoding
from thresher.flows.execute import Unit, applies_to, now_utc, unit_kind, load_units
from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.flows.store import Store
from thresher.steps.spec import StepContext
from thresher.steps.units import DocChunks, DocPages


@dataclass
class CorpusResult:
    stage: str
    affected_docs: set[str]
    counts: dict[str, int]
    rows_written: int
    seconds: float


def _freeze(v: Any) -> Any:
    if isinstance(v, dict):
        return tuple(sorted((k, _freeze(x)) for k, x in v.items()))
    if isinstance(v, list):
        return tuple(_freeze(x) for x in v)
    return v


def _decision(row: dict[str, Any], payload_names: list[str]) -> tuple:
    """What a corpus step decided about a unit: status, reason, its own columns, text."""
    return (row["status"], row.get("reason"), row.get("text"), _freeze(row.get("blocks"))) + tuple(
        _freeze(row.get(n)) for n in payload_names)


def run_corpus_step(definition: FlowDefinition, store: Store, run_id: str, index: int,
                    live_docs: dict[str, tuple[int, str]], rewrite_docs: set[str]) -> CorpusResult:
    """Run the corpus-wide step at `index` over all live documents.

    live_docs maps doc_id -> (rank, source path). Documents in rewrite_docs get every
    unit written (their input changed this run); for the rest only units whose
    decision changed are written, so unchanged weeks write next to nothing.
    """
    t0 = time.perf_counter()
    step = definition.steps[index]
    kind = unit_kind(step)
    loaded = load_units(store, definition, index, sorted(live_docs), run_id)
    loaded = {d: v for d, v in loaded.items() if d in live_docs and v.units and applies_to(step, v.units)}
    if kind == "chunks":
        docs: list[Any] = [DocChunks(d, live_docs[d][1], live_docs[d][0], list(v.units)) for d, v in loaded.items()]
    else:
        docs = [DocPages(d, live_docs[d][1], live_docs[d][0], list(v.units)) for d, v in loaded.items()]
    docs.sort(key=lambda d: (d.rank, d.source_path))
    ctx = StepContext(encoding=get_encoding)
    started = now_utc()
    out = step.spec.run(docs, step.params, ctx) if docs else []
    ms = (time.perf_counter() - t0) * 1000.0

    by_doc: dict[str, list[Unit]] = defaultdict(list)
    if kind == "chunks":
        owner = {c.chunk_id: d.doc_id for d in docs for c in d.chunks}
        for chunk in out:
            by_doc[owner[chunk.chunk_id]].append(chunk)
    else:
        for doc_pages in out:  # a page step returns DocPages: pages do not name their document
            by_doc[doc_pages.doc_id].extend(doc_pages.pages)

    current = store.current(step.name, kind, sorted(live_docs), include_run=run_id)
    payload_names = [f.name for f in schema.payload_fields(step.name, kind)]
    before = {r["unit_id"]: _decision(r, payload_names) for r in current.to_pylist()}
    attempts = store.max_attempts(step.name, kind, sorted(by_doc))

    all_rows: list[dict[str, Any]] = []
    writes: list[tuple[str, str]] = []
    affected: set[str] = set()
    counts: dict[str, int] = {}
    for doc_id, units in sorted(by_doc.items()):
        rctx = RowContext(run_id, doc_id, live_docs[doc_id][1], step.name, step.spec.version, step.digest,
                          kind, loaded[doc_id].stage, started, round(ms, 3), attempts)
        rows = [to_row(rctx, u) for u in units]
        for u in units:
            counts[u.status] = counts.get(u.status, 0) + 1
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
        store.write_stage_part(step.name, run_id, "corpus", rows_to_table(step.name, kind, all_rows), writes)
    return CorpusResult(step.name, affected, counts, len(all_rows), time.perf_counter() - t0)
