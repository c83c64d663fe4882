"""The hand-off table (one row per live chunk) and the change set since the last one."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

import pyarrow as pa

from thresher.flows import schema
from thresher.flows.config import FlowDefinition
from thresher.flows.store import Store
from thresher.steps.units import OK


@dataclass
class HandoffResult:
    chunks: pa.Table
    changes: pa.Table
    upserts: int
    deletes: int


def _chunk_stages(definition: FlowDefinition) -> list[tuple[str, bool]]:
    """(stage, format-limited) for every stage that holds chunks, in chain order."""
    return [(s.name, bool(s.spec.formats)) for s in definition.steps if s.spec.produces == "chunks"]


def _row_digest(row: dict[str, Any]) -> str:
    body = {k: v for k, v in row.items() if k != "run_id"}
    if isinstance(body.get("token_counts"), list):
        body["token_counts"] = sorted(map(tuple, body["token_counts"]))
    elif isinstance(body.get("token_counts"), dict):
        body["token_counts"] = sorted(body["token_counts"].items())
    return hashlib.sha256(json.dumps(body, sort_keys=True, default=str).encode()).hexdigest()


def _plain_hash(text: str) -> str:
    # Used only when the chain has no dedup step to provide its normalised hash.
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def build_handoff(definition: FlowDefinition, store: Store, run_id: str,
                  live: dict[str, tuple[int, str]]) -> HandoffResult:
    # A chunk is live when every chunk stage holds it as ok, except that a stage limited
    # to some formats may have passed it by. Its columns come from the last stage holding it.
    docs = sorted(live)
    live_ids: set[str] | None = None
    not_ok: set[str] = set()
    hashes: dict[str, str] = {}
    latest: dict[str, dict[str, Any]] = {}
    for stage, limited in _chunk_stages(definition):
        rows = store.current(stage, "chunks", docs, include_run=run_id).to_pylist()
        ok = {r["chunk_id"] for r in rows if r["status"] == OK}
        not_ok |= {r["chunk_id"] for r in rows if r["status"] != OK}
        if not limited:
            live_ids = ok if live_ids is None else (live_ids & ok)
        for r in rows:
            latest[r["chunk_id"]] = r
            if r.get("content_hash"):
                hashes[r["chunk_id"]] = r["content_hash"]
    keep = (live_ids or set()) - not_ok

    out = []
    for r in latest.values():
        if r["chunk_id"] not in keep or r["doc_id"] not in live:
            continue
        counts = r.get("token_counts")
        if counts is None:
            counts = {r["encoding"]: r["token_count"]} if r.get("encoding") and r.get("token_count") is not None else {}
        elif not isinstance(counts, dict):
            counts = dict(counts)
        out.append({
            "chunk_id": r["chunk_id"], "doc_id": r["doc_id"], "source_path": live[r["doc_id"]][1],
            "title": r.get("title"), "heading_path": r.get("heading_path") or [],
            "chunk_index": r.get("chunk_index"), "page_start": r.get("page_start"), "page_end": r.get("page_end"),
            "char_start": r.get("char_start"), "char_end": r.get("char_end"),
            "prefix_chars": r.get("prefix_chars") or 0, "language": r.get("language"),
            "text": r.get("text"), "token_count": r.get("token_count"), "encoding": r.get("encoding"),
            "token_counts": counts, "content_hash": hashes.get(r["chunk_id"]) or _plain_hash(r.get("text") or ""),
            "run_id": r["run_id"],
        })
    out.sort(key=lambda r: (r["source_path"], r["chunk_index"] or 0, r["chunk_id"]))
    chunks = pa.Table.from_pylist(out, schema=schema.HANDOFF)

    previous = store.handoff()
    before = {} if previous is None else {r["chunk_id"]: r for r in previous.to_pylist()}
    after = {r["chunk_id"]: r for r in out}
    changes = []
    for cid, r in after.items():
        old = before.get(cid)
        if old is None or _row_digest(old) != _row_digest(r):
            changes.append({"chunk_id": cid, "action": "upsert", "doc_id": r["doc_id"], "source_path": r["source_path"],
                            "content_hash": r["content_hash"], "run_id": run_id})
    for cid, r in before.items():
        if cid not in after:
            changes.append({"chunk_id": cid, "action": "delete", "doc_id": r["doc_id"], "source_path": r["source_path"],
                            "content_hash": r["content_hash"], "run_id": run_id})
    changes.sort(key=lambda c: (c["action"], c["source_path"] or "", c["chunk_id"]))
    n_up = sum(1 for c in changes if c["action"] == "upsert")
    return HandoffResult(chunks, pa.Table.from_pylist(changes, schema=schema.CHANGES), n_up, len(changes) - n_up)
