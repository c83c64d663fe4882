"""The hand-off table (one row per live chunk) and the change set since the last one.

Built in groups of documents, so memory holds one group's chunks at a time, not the
drive's: each group's chunk stages are read with a doc_id filter, its live chunks
appended to the staged hand-off file, and a digest per chunk kept (a small Arrow
table) to compare with the previous hand-off's digests for the change set.
"""

from __future__ import annotations

import hashlib
import json
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from thresher.flows import schema
from thresher.flows.config import FlowDefinition
from thresher.flows.faults import fault
from thresher.flows.store import Store
from thresher.steps.units import OK

# Documents per group: a few thousand chunks in memory at a time on a typical drive.
GROUP_DOCS = 500

DIGESTS = pa.schema([
    pa.field("chunk_id", pa.string(), nullable=False),
    pa.field("digest", pa.string(), nullable=False),
    pa.field("doc_id", pa.string()),
    pa.field("source_path", pa.string()),
    pa.field("content_hash", pa.string()),
])


@dataclass
class HandoffResult:
    chunks: int
    tokens: int
    upserts: int
    deletes: int
    per_doc: dict[str, tuple[int, int]] = field(default_factory=dict)  # doc_id -> (chunks, tokens)
    # Documents left out because their access allows nobody: source path -> reason.
    withheld: dict[str, str] = field(default_factory=dict)


Access = dict[str, tuple[list[str], "str | None", str]]  # doc_id -> (readers, label, rule key)


def _chunk_stages(definition: FlowDefinition) -> list[tuple[str, bool]]:
    """(stage, format-limited) for every stage that holds chunks, in chain order."""
    return [(s.name, bool(s.spec.formats)) for s in definition.steps if s.spec.produces == "chunks"]


def _row_digest(row: dict[str, Any]) -> str:
    """What an index holds of a chunk: every hand-off column but the producing run."""
    body = {k: v for k, v in row.items() if k != "run_id"}
    counts = body.get("token_counts")
    if isinstance(counts, dict):
        body["token_counts"] = sorted(counts.items())
    elif isinstance(counts, list):
        body["token_counts"] = sorted(map(tuple, counts))
    return hashlib.sha256(json.dumps(body, sort_keys=True, default=str).encode()).hexdigest()


def _plain_hash(text: str) -> str:
    # Used only when the chain has no dedup step to provide its normalised hash.
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _group_rows(definition: FlowDefinition, store: Store, run_id: str, docs: list[str],
                live: dict[str, tuple[int, str]], access: Access) -> list[dict[str, Any]]:
    """Hand-off rows of one group of documents, in (path, chunk index) order.

    A chunk is live when every chunk stage holds it as ok, except that a stage limited
    to some formats may have passed it by. Its columns come from the last stage holding it.
    """
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
        readers, label, _ = access[r["doc_id"]]
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
            "readers": readers, "label": label, "run_id": r["run_id"],
        })
    out.sort(key=lambda r: (r["source_path"], r["chunk_index"] or 0, r["chunk_id"]))
    return out


def previous_digests(store: Store) -> pa.Table:
    """Digests of the hand-off now published (computed from it if it has none stored)."""
    rel = store.published("handoff/digests.parquet")
    if rel is not None:
        return store.read_table(rel)
    previous = store.published("handoff/chunks.parquet")
    if previous is None:
        return DIGESTS.empty_table()
    rows = [{"chunk_id": r["chunk_id"], "digest": _row_digest(r), "doc_id": r["doc_id"],
             "source_path": r["source_path"], "content_hash": r["content_hash"]}
            for r in store.read_table(previous).to_pylist()]
    return pa.Table.from_pylist(rows, schema=DIGESTS)


def build_handoff(definition: FlowDefinition, store: Store, run_id: str, live: dict[str, tuple[int, str]],
                  access: Access, chunks_rel: str, digests_rel: str, changes_rel: str) -> HandoffResult:
    """Write the hand-off, its digests and the change set to the given (staged) paths.

    Access is joined on here, from the catalog: a document whose access allows nobody
    is left out (fail closed), so its chunks leave the index through the change set.
    """
    withheld = {live[d][1]: f"access allows nobody ({access[d][2]})" for d in live if not access[d][0]}
    order = sorted((d for d in live if access[d][0]), key=lambda d: live[d][1])
    digest_parts: list[pa.Table] = []
    per_doc: dict[str, tuple[int, int]] = {}
    total_chunks = total_tokens = 0
    with store.parquet_writer(chunks_rel, schema.HANDOFF, run_id=run_id) as writer:
        for start in range(0, len(order), GROUP_DOCS):
            rows = _group_rows(definition, store, run_id, order[start:start + GROUP_DOCS], live, access)
            if not rows:
                continue
            writer.write_table(pa.Table.from_pylist(rows, schema=schema.HANDOFF))
            digest_parts.append(pa.Table.from_pylist(
                [{"chunk_id": r["chunk_id"], "digest": _row_digest(r), "doc_id": r["doc_id"],
                  "source_path": r["source_path"], "content_hash": r["content_hash"]} for r in rows],
                schema=DIGESTS))
            counts: Counter = Counter()
            tokens: Counter = Counter()
            for r in rows:
                counts[r["doc_id"]] += 1
                tokens[r["doc_id"]] += r["token_count"] or 0
            per_doc.update({d: (counts[d], tokens[d]) for d in counts})
            total_chunks += len(rows)
            total_tokens += sum(tokens.values())
    fault("handoff-chunks-staged")
    new = pa.concat_tables(digest_parts) if digest_parts else DIGESTS.empty_table()
    store.write_table(digests_rel, new, run_id=run_id)
    fault("handoff-digests-staged")

    old = previous_digests(store)
    # Upsert: new chunk ids, or any column an index holds changed. Delete: ids gone.
    joined = new.join(old.select(["chunk_id", "digest"]).rename_columns(["chunk_id", "old_digest"]),
                      keys="chunk_id", join_type="left outer")
    changed = pc.or_kleene(pc.is_null(joined.column("old_digest")),
                           pc.not_equal(joined.column("digest"), joined.column("old_digest")))
    upserts = joined.filter(pc.fill_null(changed, True))
    gone = old.join(new.select(["chunk_id"]), keys="chunk_id", join_type="left anti")

    def _changes(t: pa.Table, action: str) -> pa.Table:
        n = t.num_rows
        return pa.table({"chunk_id": t.column("chunk_id"), "action": pa.array([action] * n, pa.string()),
                         "doc_id": t.column("doc_id"), "source_path": t.column("source_path"),
                         "content_hash": t.column("content_hash"), "run_id": pa.array([run_id] * n, pa.string())},
                        schema=schema.CHANGES)

    changes = pa.concat_tables([_changes(upserts, "upsert"), _changes(gone, "delete")])
    changes = changes.sort_by([("action", "ascending"), ("source_path", "ascending"), ("chunk_id", "ascending")])
    store.write_table(changes_rel, changes, run_id=run_id)
    return HandoffResult(total_chunks, total_tokens, upserts.num_rows, gone.num_rows, per_doc, withheld)
