"""Deciding what a run must do: the new catalog, and where each document starts.

A document (one doc_id) is skipped when the store already processed it with the
same chain of step versions and parameters; otherwise it starts at the first
stage whose stored rows were made with a different step version or parameters.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

import pyarrow as pa

from thresher.flows import schema
from thresher.flows.config import FlowDefinition
from thresher.flows.discover import SourceFile
from thresher.flows.execute import DocJob
from thresher.flows.store import Store


@dataclass
class Plan:
    catalog: pa.Table
    jobs: list[DocJob]  # documents to process, largest first
    skipped: list[str]  # doc_ids reused as stored
    deleted: list[str]  # doc_ids no longer at any path
    live: dict[str, tuple[int, str]]  # doc_id -> (rank, canonical path)
    copies: dict[str, list[str]] = field(default_factory=dict)  # doc_id -> other paths with the same bytes


def _ts(epoch: float) -> datetime:
    return datetime.fromtimestamp(epoch, tz=timezone.utc)


def start_stages(definition: FlowDefinition, store: Store, doc_ids: list[str]) -> dict[str, int]:
    """For documents the store knows, the first stage whose rows are out of date."""
    start = {d: len(definition.steps) for d in doc_ids}
    remaining = set(doc_ids)
    first = definition.steps[0]
    formats: dict[str, str] = {}
    if any(s.spec.formats for s in definition.steps):
        t = store.current(first.name, first.spec.produces, sorted(remaining), columns=["doc_id", "format"])
        formats = dict(zip(t.column("doc_id").to_pylist(), t.column("format").to_pylist()))
    for i, step in enumerate(definition.steps):
        if not remaining:
            break
        rows = store.current(step.name, step.spec.produces, sorted(remaining),
                             columns=["doc_id", "step_version", "config_digest"])
        good: dict[str, bool] = {}
        for d, v, c in zip(rows.column("doc_id").to_pylist(), rows.column("step_version").to_pylist(),
                           rows.column("config_digest").to_pylist()):
            good[d] = good.get(d, True) and v == step.spec.version and c == step.digest
        for d in list(remaining):
            passed_by = bool(step.spec.formats) and d not in good and formats.get(d) not in step.spec.formats
            if not good.get(d, passed_by):
                start[d] = i
                remaining.discard(d)
    for d in remaining:
        start[d] = 0  # stored rows all current yet the chain digest differs: redo all
    return start


def live_documents(catalog_rows: list[dict], seq_of: dict[str, int], sequence: int
                   ) -> tuple[dict[str, str], dict[str, tuple[int, str]], dict[str, list[str]]]:
    """From catalog rows: canonical path per live document, ranks, and copies.

    A document's rank orders it for deterministic choices (the canonical chunk of a
    duplicate cluster): first the run that first saw it, then its canonical path.
    """
    present_paths: dict[str, list[str]] = {}
    for r in catalog_rows:
        if r["present"]:
            present_paths.setdefault(r["doc_id"], []).append(r["source_path"])
    first_seq: dict[str, int] = {}
    for r in catalog_rows:
        s = seq_of.get(r["first_run"], sequence)
        first_seq[r["doc_id"]] = min(first_seq.get(r["doc_id"], s), s)
    canonical = {d: min(paths) for d, paths in present_paths.items()}
    order = sorted(canonical, key=lambda d: (first_seq[d], canonical[d]))
    live = {d: (rank, canonical[d]) for rank, d in enumerate(order)}
    copies = {d: sorted(p for p in paths if p != canonical[d]) for d, paths in present_paths.items() if len(paths) > 1}
    return canonical, live, copies


def make_plan(definition: FlowDefinition, store: Store, files: list[SourceFile], run_id: str,
              sequence: int, force: bool = False) -> Plan:
    old = store.catalog().to_pylist()
    old_by_path = {r["source_path"]: r for r in old}
    seq_of = {r.run_id: r.sequence for r in store.runs()}
    chain = definition.chain_digest

    # Documents the store processed already, and with which chain.
    processed_with: dict[str, set[str]] = {}
    for r in old:
        if r.get("chain_digest"):
            processed_with.setdefault(r["doc_id"], set()).add(r["chain_digest"])

    rows = []
    seen_paths = set()
    for f in files:
        prev = old_by_path.get(f.source_path)
        same = prev is not None and prev["doc_id"] == f.doc_id
        rows.append({
            "source_path": f.source_path, "doc_id": f.doc_id, "size": f.size, "mtime": _ts(f.mtime),
            "mtime_ns": f.mtime_ns, "inode": f.inode, "device": f.device, "ctime_ns": f.ctime_ns,
            "first_run": prev["first_run"] if same else run_id, "last_run": run_id, "present": True,
            "canonical_path": None, "chain_digest": None,
        })
        seen_paths.add(f.source_path)
    for r in old:
        if r["source_path"] not in seen_paths:
            gone = dict(r)
            gone["present"] = False
            rows.append(gone)

    canonical, live, copies = live_documents(rows, seq_of, sequence)

    file_at = {f.source_path: f for f in files}
    to_do = [d for d in canonical if force or chain not in processed_with.get(d, set())]
    skipped = sorted(set(canonical) - set(to_do))
    known = [d for d in to_do if d in processed_with]
    starts = start_stages(definition, store, known) if known and not force else {}
    jobs = []
    for d in to_do:
        f = file_at[canonical[d]]
        jobs.append(DocJob(doc_id=d, source_path=canonical[d], abs_path=f.abs_path, size=f.size,
                           mtime=f.mtime, start=starts.get(d, 0), known=d in processed_with))
    jobs.sort(key=lambda j: (-j.size, j.source_path))

    for r in rows:
        if r["present"]:
            # After this run every present document is processed with this chain.
            r["canonical_path"] = canonical[r["doc_id"]]
            r["chain_digest"] = chain
    rows.sort(key=lambda r: r["source_path"])
    deleted = sorted({r["doc_id"] for r in old if r["present"]} - set(canonical))
    catalog = pa.Table.from_pylist(rows, schema=schema.CATALOG)
    return Plan(catalog=catalog, jobs=jobs, skipped=skipped, deleted=deleted, live=live, copies=copies)
