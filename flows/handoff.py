"""The hand-off table (one row per live chunk) and the change set since the last one.

Built from the stages in groups of documents, so memory holds one group's chunks at
a time, not the drive's: each group's chunk stages are read with a doc_id filter, its
live chunks appended to the staged hand-off file, and a digest per chunk kept (a
small Arrow table) to compare with the previous hand-off's digests for the change set.

A run usually changes few documents, so the hand-off is not rebuilt: the previous
file (when it is the one its run recorded, of the same chain and columns: the basis
in its file metadata) is streamed batch by batch, rows of unchanged documents copied
with only `readers` and `label` replaced, and the documents the run wrote stage rows
of, whose paths changed or that it did not hold, read from the stages and merged in
at their place in path order (_copy_forward). Row groups depend only on the rows
(_Output), so that copy writes the bytes a rebuild writes. A chunk's digest is the
digest of its body (every column but run_id, readers and label) combined with its
access, so copied chunks' digests come from the stored body digests.
"""

from __future__ import annotations

import bisect
import hashlib
import json
import tempfile
from collections import Counter
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from thresher.flows import schema
from thresher.flows.arrow_groups import count_and_sum_per_key, highest_per_key
from thresher.flows.config import FlowDefinition
from thresher.flows.faults import fault
from thresher.flows.regroup import Regrouped
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
    pa.field("body_digest", pa.string()),  # every column but run_id, readers and label
])

# File metadata of the hand-off: what it was built from, access aside (see handoff_basis).
BASIS_KEY = b"thresher.handoff_basis"
ACCESS_COLUMNS = ("readers", "label")
# Rows per batch of the streamed access rewrite: tens of MB of chunk text in memory,
# and row groups not so small that writing them costs more than the rows.
REWRITE_BATCH = 32768
# Rows per row group of the hand-off, however it is made (see _Output).
ROW_GROUP = 32768
# The manifest's `handoff` when the published hand-off stands as it is.
KEPT = "kept as published"


@dataclass
class HandoffResult:
    chunks: int
    tokens: int
    upserts: int
    deletes: int
    per_doc: dict[str, tuple[int, int]] = field(default_factory=dict)  # doc_id -> (chunks, tokens)
    # Documents left out because their access allows nobody: source path -> reason.
    withheld: dict[str, str] = field(default_factory=dict)
    # How it was made: "rebuilt" (every stage read), "access columns rewritten" (the
    # previous one copied, no stage read but for documents it withheld), "copied
    # forward, N of M documents read from the stages", or KEPT (nothing in it would
    # change: no hand-off or digests written, the published ones stand).
    mode: str = "rebuilt"

    @property
    def kept(self) -> bool:
        return self.mode == KEPT

    @property
    def access_only(self) -> bool:
        return self.mode == "access columns rewritten"


Access = dict[str, tuple[list[str], "str | None", str]]  # doc_id -> (readers, label, rule key)


def _body_digest(body: dict[str, Any]) -> str:
    """Digest of a chunk's body: every hand-off column but the producing run and the
    access columns (the caller leaves those out)."""
    counts = body.get("token_counts")
    if isinstance(counts, dict):
        body["token_counts"] = sorted(counts.items())
    elif isinstance(counts, list):
        body["token_counts"] = sorted(map(tuple, counts))
    return hashlib.sha256(json.dumps(body, sort_keys=True, default=str).encode()).hexdigest()


def _access_bytes(readers: list[str], label: str | None) -> bytes:
    return json.dumps([list(readers), label]).encode()


def _digest(body_digest: str, access_bytes: bytes) -> str:
    """What an index holds of a chunk: its body and its access (not the producing run)."""
    return hashlib.sha256(body_digest.encode() + access_bytes).hexdigest()


def _digest_table(t: pa.Table) -> pa.Table:
    """DIGESTS of hand-off rows, in their order. A document's chunks share its access."""
    bodies = [_body_digest(b) for b in t.drop_columns(["run_id", *ACCESS_COLUMNS]).to_pylist()]
    access: dict[str, bytes] = {}
    digests = []
    for body, doc, readers, label in zip(bodies, *(t.column(c).to_pylist() for c in ("doc_id", *ACCESS_COLUMNS))):
        held = access.get(doc)
        if held is None:
            held = access[doc] = _access_bytes(readers, label)
        digests.append(_digest(body, held))
    return pa.table({"chunk_id": t.column("chunk_id"), "digest": pa.array(digests, pa.string()),
                     "doc_id": t.column("doc_id"), "source_path": t.column("source_path"),
                     "content_hash": t.column("content_hash"), "body_digest": pa.array(bodies, pa.string())},
                    schema=DIGESTS)


def handoff_basis(definition: FlowDefinition) -> str:
    """What every row of a hand-off depends on besides its document's stage rows, paths
    and access: the chain and the hand-off's columns. A hand-off of another basis is
    never copied forward."""
    body = {"chain": definition.chain_digest, "columns": str(schema.HANDOFF)}
    return hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()


def _plain_hash(text: str) -> str:
    # Used only when the chain has no dedup step to provide its normalised hash.
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# Stage columns a hand-off row is made of (_group_rows).
_SOURCE_COLUMNS = ("chunk_id", "doc_id", "status", "run_id", "title", "heading_path", "chunk_index", "page_start",
                   "page_end", "char_start", "char_end", "prefix_chars", "language", "text", "token_count",
                   "encoding", "token_counts", "content_hash")
# What is read of a chunk stage before the last one every live chunk passes whole.
_STATUS_COLUMNS = ("chunk_id", "doc_id", "status", "content_hash")
# Hand-off columns taken from the stage row that holds a live chunk last.
_ROW_COLUMNS = [c for c in _SOURCE_COLUMNS if c not in ("status", "content_hash")]
_SOURCE_TYPES = {c: schema.HANDOFF.field(c).type for c in _SOURCE_COLUMNS if c != "status"}


def _stage_columns(definition: FlowDefinition) -> list[tuple[str, bool, list[str]]]:
    """(stage, format-limited, columns to read) for every chunk stage, in chain order.

    A live chunk is ok at the last stage not limited to some formats, so its columns
    come from there or a later stage: the stages before it are read for their statuses
    and content hashes only (not the text of every chunk once per stage). Only the
    columns a hand-off row is made of: the rest (blocks, signatures, band keys,
    tracebacks) made up most of the rows' conversion to Python."""
    stages = [(s.name, bool(s.spec.formats)) for s in definition.steps if s.spec.produces == "chunks"]
    last_whole = max((i for i, (_, limited) in enumerate(stages) if not limited), default=0)
    out = []
    for i, (stage, limited) in enumerate(stages):
        names = set(schema.stage_schema(stage, "chunks").names)
        wanted = _SOURCE_COLUMNS if i >= last_whole else _STATUS_COLUMNS
        out.append((stage, limited, [c for c in wanted if c in names]))
    return out


# Reads a stage's current chunk rows (these columns) of one group of documents.
StageReader = Callable[[str, list[str]], pa.Table]


def _from_store(store: Store, run_id: str, docs: list[str]) -> StageReader:
    return lambda stage, columns: store.current(stage, "chunks", docs, columns=columns, include_run=run_id)


def _latest(tables: list[pa.Table], names: list[str]) -> pa.Table:
    """Per chunk, the row of the last of `tables` (in chain order) holding it: these
    columns, null where that stage has none."""
    picked: list[pa.Table] = []
    taken: pa.Array = pa.array([], pa.string())
    for t in reversed(tables):
        t = t.filter(pc.invert(pc.is_in(t.column("chunk_id"), value_set=taken)))
        taken = pa.concat_arrays([taken, t.column("chunk_id").combine_chunks()])
        picked.append(pa.table({n: t.column(n) if n in t.column_names else pa.nulls(t.num_rows, _SOURCE_TYPES[n])
                                for n in names}))
    return pa.concat_tables(picked).combine_chunks()


def _group_table(definition: FlowDefinition, read: StageReader, live: dict[str, tuple[int, str, int]],
                 access: Access, copies: dict[str, list[str]]) -> pa.Table:
    """Hand-off rows of one group of documents (`read` gives their stage rows), in
    (path, chunk index) order.

    A chunk is live when every chunk stage holds it as ok, except that a stage limited
    to some formats may have passed it by. Its columns come from the last stage holding
    it; its content hash from the last stage giving one. Made in Arrow: as Python rows
    (dicts, then back to Arrow) this took 1.6 s of a 41,370-chunk rebuild's 4.1 s under
    cProfile.
    """
    live_ids: pa.Array | None = None
    not_ok: list[pa.Array] = []
    hashed: list[pa.Table] = []
    full: list[pa.Table] = []
    for stage, limited, columns in _stage_columns(definition):
        t = read(stage, columns)
        ids = t.column("chunk_id").combine_chunks()
        ok = pc.fill_null(pc.equal(t.column("status"), OK), False).combine_chunks()
        not_ok.append(ids.filter(pc.invert(ok)))
        if not limited:
            ok_ids = ids.filter(ok)
            live_ids = ok_ids if live_ids is None else live_ids.filter(pc.is_in(live_ids, value_set=ok_ids))
        if "content_hash" in columns:
            h = t.column("content_hash")
            hashed.append(t.select(["chunk_id", "content_hash"]).filter(
                pc.fill_null(pc.not_equal(h, ""), False)))
        if "text" in columns:
            full.append(t)
    if live_ids is None or not full:
        return schema.HANDOFF.empty_table()
    keep = live_ids.filter(pc.invert(pc.is_in(live_ids, value_set=pa.concat_arrays(not_ok))))
    rows = _latest([t.filter(pc.is_in(t.column("chunk_id"), value_set=keep)) for t in full], _ROW_COLUMNS)
    docs = [d for d in pc.unique(rows.column("doc_id")).to_pylist() if d in live]
    at = pc.index_in(rows.column("doc_id"), value_set=pa.array(docs, pa.string()))
    rows = rows.filter(pc.is_valid(at))
    at = _array(at.filter(pc.is_valid(at)))
    n = rows.num_rows

    def per_doc(values: list, field_name: str) -> pa.Array:
        return pa.array(values, schema.HANDOFF.field(field_name).type).take(at)

    if hashed:
        hashes = _latest(hashed, ["chunk_id", "content_hash"])
        content_hash = pc.take(hashes.column("content_hash"),
                               pc.index_in(rows.column("chunk_id"), value_set=hashes.column("chunk_id")))
    else:
        content_hash = pa.nulls(n, pa.string())
    content_hash = _filled(content_hash, rows.column("text"), lambda text: _plain_hash(text or ""))
    counts = rows.column("token_counts")
    if counts.null_count:  # a chain whose last chunk stage keeps no token_counts
        pairs = zip(rows.column("encoding").to_pylist(), rows.column("token_count").to_pylist())
        made = pa.array([{e: k} if e and k is not None else {} for e, k in pairs], _SOURCE_TYPES["token_counts"])
        counts = pc.if_else(pc.is_null(counts), made, counts)
    heading = rows.column("heading_path")
    columns = {
        "chunk_id": rows.column("chunk_id"), "doc_id": rows.column("doc_id"),
        "source_path": per_doc([live[d][1] for d in docs], "source_path"),
        "source_paths": per_doc([[live[d][1], *copies.get(d, [])] for d in docs], "source_paths"),
        "heading_path": pc.if_else(pc.is_null(heading), pa.scalar([], heading.type), heading),
        "prefix_chars": pc.fill_null(rows.column("prefix_chars"), 0),
        "token_counts": counts, "content_hash": content_hash,
        "readers": per_doc([access[d][0] for d in docs], "readers"),
        "label": per_doc([access[d][1] for d in docs], "label"),
    }
    out = pa.table({f.name: columns[f.name] if f.name in columns else rows.column(f.name)
                    for f in schema.HANDOFF}, schema=schema.HANDOFF)
    order = pa.table({"p": out.column("source_path"), "i": pc.fill_null(out.column("chunk_index"), 0),
                      "c": out.column("chunk_id")})
    return out.take(pc.sort_indices(order, sort_keys=[("p", "ascending"), ("i", "ascending"), ("c", "ascending")]))


def _array(values: pa.Array | pa.ChunkedArray) -> pa.Array:
    return values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values


def _filled(values: pa.Array, source: pa.Array, make: Callable[[Any], Any]) -> pa.Array:
    """`values` with each null or empty one made from the same row of `source`."""
    values = _array(pc.if_else(pc.equal(values, ""), pa.scalar(None, values.type), values))
    if not values.null_count:
        return values
    missing = pc.is_null(values)
    made = pa.array([make(v) for v in pc.filter(source, missing).to_pylist()], values.type)
    return pc.replace_with_mask(values, missing, made)


def previous_digests(store: Store) -> pa.Table:
    """Digests of the hand-off now published (computed from it if it has none stored,
    or none of the current form: body and access digested apart)."""
    rel = store.published("handoff/digests.parquet")
    if rel is not None:
        stored = store.read_table(rel)
        if stored.schema.names == DIGESTS.names:
            return stored
    previous = store.published("handoff/chunks.parquet")
    if previous is None:
        return DIGESTS.empty_table()
    return _digest_table(store.read_table(previous))


def _previous_basis(store: Store) -> tuple[str | None, str | None]:
    """(published hand-off's store path, the basis recorded in its metadata), or Nones
    when it is not the file its run recorded (size and SHA-256): a damaged or altered
    hand-off is rebuilt from the stages, never copied forward."""
    rel = store.published("handoff/chunks.parquet")
    if rel is None:
        return None, None
    for name in ("handoff/chunks.parquet", "handoff/digests.parquet"):
        here = store.published(name)
        recorded = store.published_record(name)
        if here is None or recorded is None or recorded != store.file_record(here):
            return None, None
    with store.fs.open_input_file(store.path(rel)) as f:
        meta = pq.read_schema(f).metadata or {}
    basis = meta.get(BASIS_KEY)
    return rel, basis.decode() if basis else None


class _Output:
    """The hand-off writer: rows in, row groups of exactly ROW_GROUP rows out.

    Row groups depend only on the rows, never on how they were gathered (a group of
    documents read from the stages, a batch of the previous file), so a streamed copy
    and a rebuild of the same rows write the same bytes. Keeps per-document chunk and
    token counts and the chunk ids in write order (for the digests)."""

    def __init__(self, writer):
        self.writer = writer
        self.pending: list[pa.Table] = []
        self.held = 0
        self.ids: list[pa.ChunkedArray] = []
        self.counts: Counter = Counter()
        self.tokens: Counter = Counter()

    def write(self, t: pa.Table) -> None:
        if not t.num_rows:
            return
        for d, n, k in count_and_sum_per_key(t.column("doc_id"), t.column("token_count")):
            self.counts[d] += n
            self.tokens[d] += k
        self.ids.append(t.column("chunk_id"))
        self.pending.append(t)
        self.held += t.num_rows
        if self.held >= ROW_GROUP:
            self._flush(final=False)

    def _flush(self, final: bool) -> None:
        t = pa.concat_tables(self.pending)
        cut = t.num_rows if final else t.num_rows - t.num_rows % ROW_GROUP
        for start in range(0, cut, ROW_GROUP):
            # One contiguous array per column: the writer's pages then do not depend
            # on how the rows arrived.
            piece = t.slice(start, min(ROW_GROUP, cut - start)).combine_chunks()
            self.writer.write_table(piece, row_group_size=ROW_GROUP)
        rest = t.slice(cut)
        self.pending, self.held = ([rest], rest.num_rows) if rest.num_rows else ([], 0)

    def close(self) -> None:
        if self.held:
            self._flush(final=True)

    def chunk_ids(self) -> pa.Array:
        return pa.chunked_array(self.ids, pa.string()).combine_chunks() if self.ids else pa.array([], pa.string())


def _rebuild(definition: FlowDefinition, store: Store, run_id: str, live: dict[str, tuple[int, str, int]],
             access: Access, order: list[str], out: _Output, copies: dict[str, list[str]]) -> pa.Table:
    """Every live chunk read from the chunk stages, a group of documents at a time.

    With more than one group the stages are first sorted into the groups
    (regroup.Regrouped): read from the store group by group, each group decoded most
    of every part file (a 3,159-document drive's first run, 7 groups: 5.1 s of CPU in
    the reads against 1.0 s for the same rows read once)."""
    digest_parts: list[pa.Table] = []
    groups = [order[start:start + GROUP_DOCS] for start in range(0, len(order), GROUP_DOCS)]
    with ExitStack() as scratch:
        regrouped = None
        if len(groups) > 1:
            stages = [(stage, columns) for stage, _, columns in _stage_columns(definition)]
            try:
                into = scratch.enter_context(tempfile.TemporaryDirectory(prefix="thresher-handoff-"))
                regrouped = Regrouped(store, run_id, stages, groups, into)
            except OSError:
                regrouped = None  # no room in the temporary folder (TMPDIR): the slower reads, same rows
        for k, docs in enumerate(groups):
            read = _from_store(store, run_id, docs) if regrouped is None else partial(_regrouped_read, regrouped, k)
            rows = _group_table(definition, read, live, access, copies)
            if not rows.num_rows:
                continue
            out.write(rows)
            digest_parts.append(_digest_table(rows))
    return pa.concat_tables(digest_parts) if digest_parts else DIGESTS.empty_table()


def _regrouped_read(regrouped: Regrouped, group: int, stage: str, columns: list[str]) -> pa.Table:
    return regrouped.read(stage, group)


class _FreshRows:
    """The hand-off rows of documents read from the stages, in path order, one group of
    GROUP_DOCS documents in memory at a time (read when the copy reaches it)."""

    def __init__(self, definition: FlowDefinition, store: Store, run_id: str, docs: list[str],
                 live: dict[str, tuple[int, str, int]], access: Access, copies: dict[str, list[str]]):
        self.args = (definition, store, run_id)
        self.live, self.access, self.copies = live, access, copies
        self.groups = [docs[i:i + GROUP_DOCS] for i in range(0, len(docs), GROUP_DOCS)]
        self.rows = schema.HANDOFF.empty_table()
        self.paths: list[str] = []
        self.docs: list[str] = []
        self.at = 0
        self.digests: list[pa.Table] = []

    def next_path(self) -> str | None:
        """The live path of the next document waiting, or None when none is left."""
        while self.at >= len(self.paths) and self.groups:
            definition, store, run_id = self.args
            self.rows = _group_table(definition, _from_store(store, run_id, self.groups.pop(0)), self.live,
                                     self.access, self.copies)
            self.paths = self.rows.column("source_path").to_pylist()
            self.docs = self.rows.column("doc_id").to_pylist()
            self.at = 0
            self.digests.append(_digest_table(self.rows))
        return self.paths[self.at] if self.at < len(self.paths) else None

    def take_document(self) -> pa.Table:
        """The next document's rows (next_path said there is one)."""
        doc, end = self.docs[self.at], self.at
        while end < len(self.docs) and self.docs[end] == doc:
            end += 1
        return self._take(end)

    def take_group(self) -> pa.Table:
        """The rest of the group in memory (next_path said there is a document)."""
        return self._take(len(self.paths))

    def _take(self, end: int) -> pa.Table:
        rows, self.at = self.rows.slice(self.at, end - self.at), end
        return rows


def _copy_forward(definition: FlowDefinition, store: Store, run_id: str, previous_rel: str, old: pa.Table,
                  live: dict[str, tuple[int, str, int]], access: Access, order: list[str], out: _Output,
                  copies: dict[str, list[str]], fresh: list[str]) -> pa.Table:
    """The previous hand-off streamed batch by batch: rows of documents still live and
    not in `fresh` copied with `readers` and `label` replaced; documents now withheld
    or gone left out; the `fresh` documents (path order) read from the stages, a group
    at a time, and merged in at their place in path order.

    Only for documents whose stage rows and paths are those of the previous hand-off
    (build_handoff decides): then every other column is what a rebuild gives.
    """
    fresh_set = set(fresh)
    kept_docs = pa.array([d for d in order if d not in fresh_set], pa.string())
    doc_arr = pa.array(order, pa.string())
    readers_type = schema.HANDOFF.field("readers").type
    readers_arr = pa.array([access[d][0] for d in order], readers_type)
    label_arr = pa.array([access[d][1] for d in order], pa.string())
    fresh_rows = _FreshRows(definition, store, run_id, fresh, live, access, copies)
    readers_at = schema.HANDOFF.get_field_index("readers")
    label_at = schema.HANDOFF.get_field_index("label")

    with store.fs.open_input_file(store.path(previous_rel)) as f:
        for batch in pq.ParquetFile(f).iter_batches(batch_size=REWRITE_BATCH):
            t = pa.Table.from_batches([batch])
            t = t.filter(pc.is_in(t.column("doc_id"), value_set=kept_docs))
            if not t.num_rows:
                continue
            at = pc.index_in(t.column("doc_id"), value_set=doc_arr)
            columns = t.columns
            columns[readers_at] = readers_arr.take(at)
            columns[label_at] = label_arr.take(at)
            t = pa.Table.from_arrays(columns, schema=schema.HANDOFF)
            # Documents are contiguous and in path order: a fresh one goes before the
            # first row whose path sorts after its own.
            paths = t.column("source_path").to_pylist() if fresh_rows.next_path() is not None else []
            pieces, cut = [], 0
            while (path := fresh_rows.next_path()) is not None and path < paths[-1]:
                pos = bisect.bisect_left(paths, path)
                pieces += [t.slice(cut, pos - cut), fresh_rows.take_document()]
                cut = pos
            if pieces:
                t = pa.concat_tables(pieces + [t.slice(cut)])
            out.write(t)
    while fresh_rows.next_path() is not None:
        out.write(fresh_rows.take_group())
    pending_digests = pa.concat_tables([DIGESTS.empty_table(), *fresh_rows.digests])

    # Digests in the hand-off's row order, as a rebuild writes them: a fresh chunk's
    # from its rows, a copied chunk's from the previous digests (looked up once).
    lookup = pa.concat_tables([pending_digests, old])
    new = lookup.take(pc.index_in(out.chunk_ids(), value_set=lookup.column("chunk_id")))
    # A chunk's digest covers its access: computed again only for the chunks of
    # documents whose access changed (told by each document's first chunk).
    if not new.num_rows:
        return new
    doc_col = new.column("doc_id")
    docs = pc.unique(doc_col)
    first = pc.index_in(docs, value_set=doc_col)
    heads = new.take(first).select(["doc_id", "body_digest", "digest"]).to_pylist()
    moved = [h["doc_id"] for h in heads
             if _digest(h["body_digest"], _access_bytes(*access[h["doc_id"]][:2])) != h["digest"]]
    if not moved:
        return new
    mask = pc.is_in(doc_col, value_set=pa.array(moved, pa.string()))
    again = new.filter(mask)
    digests = [_digest(b, _access_bytes(*access[d][:2]))
               for b, d in zip(again.column("body_digest").to_pylist(), again.column("doc_id").to_pylist())]
    column = pc.replace_with_mask(new.column("digest").combine_chunks(), mask.combine_chunks()
                                  if isinstance(mask, pa.ChunkedArray) else mask, pa.array(digests, pa.string()))
    return new.set_column(new.schema.get_field_index("digest"), DIGESTS.field("digest"), column)


def _unchanged(old: pa.Table, order: list[str], access: Access) -> bool:
    """With no document to read from the stages: whether a copy of the published
    hand-off would write it as it is, i.e. it holds no document that is gone or
    withheld now, and every document's access is the one its chunks' digests cover
    (told by its first chunk; a document's chunks share its access)."""
    if not old.num_rows:
        return False
    doc_col = old.column("doc_id")
    docs = pc.unique(doc_col)
    if not pc.all(pc.is_in(docs, value_set=pa.array(order, pa.string()))).as_py():
        return False
    heads = old.take(pc.index_in(docs, value_set=doc_col)).select(["doc_id", "body_digest", "digest"])
    return all(_digest(b, _access_bytes(*access[d][:2])) == g for d, b, g in
               zip(*(heads.column(c).to_pylist() for c in ("doc_id", "body_digest", "digest"))))


def _counts_of(store: Store, rel: str) -> tuple[Counter, Counter]:
    """Chunks and tokens per document of a hand-off file (two columns read)."""
    t = store.read_table(rel, columns=["doc_id", "token_count"])
    counts, tokens = Counter(), Counter()
    for d, n, k in count_and_sum_per_key(t.column("doc_id"), t.column("token_count")):
        counts[d], tokens[d] = n, k
    return counts, tokens


def _to_read(definition: FlowDefinition, store: Store, run_id: str, live: dict[str, tuple[int, str, int]],
             order: list[str], old: pa.Table, copies: dict[str, list[str]],
             previous_live: dict[str, str | None] | None) -> tuple[list[str], int] | None:
    """The documents whose hand-off rows must come from the stages, in path order, and
    how many of them for another reason than access; None when the latest run did
    not record what that takes (then everything is rebuilt).

    A document's rows change only when a run writes its rows at some stage (every
    write is in the run's ledgers, corpus steps' revised decisions about unchanged
    documents included), or its live path or other paths change (source_path,
    source_paths). A live document the previous hand-off did not hold is read when it
    was withheld, not live or at another path then; one that was live at the same path
    and allowed had no live chunk. A document the run wrote only in rows of units not
    handed off before nor now (the ledger's schema.SET_ASIDE) keeps its hand-off rows.
    """
    latest = store.latest_run()
    manifest = latest.manifest if latest is not None else {}
    copies_before = (manifest.get("documents") or {}).get("copies")
    withheld_before = manifest.get("withheld")
    if copies_before is None or withheld_before is None or previous_live is None:
        return None
    written = set().union(*(store.run_docs(s.name, run_id, handed_off=True) for s in definition.steps))
    held = highest_per_key(old.column("doc_id"), old.column("source_path"), lowest=True)
    out, not_access = [], 0
    for d in order:
        path = live[d][1]
        if d in written or (d in held and (held[d] != path or copies_before.get(d, []) != copies.get(d, []))):
            out.append(d)
            not_access += 1
        elif d not in held and (previous_live.get(d) != path or path in withheld_before):
            out.append(d)
            not_access += previous_live.get(d) != path
    return out, not_access


def build_handoff(definition: FlowDefinition, store: Store, run_id: str, live: dict[str, tuple[int, str, int]],
                  access: Access, chunks_rel: str, digests_rel: str, changes_rel: str,
                  basis: str = "", copies: dict[str, list[str]] | None = None,
                  previous_live: dict[str, str | None] | None = None) -> HandoffResult:
    """Write the hand-off, its digests and the change set to the given (staged) paths.

    `copies` (doc_id -> the document's other paths) fills each chunk's source_paths.

    Access is joined on here, from the catalog: a document whose access allows nobody
    is left out (fail closed), so its chunks leave the index through the change set.

    `basis` (handoff_basis) is recorded in the file. When the published hand-off has
    the same basis and is the file its run recorded, it is copied forward
    (_copy_forward) with only the documents _to_read names read from the stages
    (`previous_live`: doc_id -> live path of the documents live in the latest run); else, or when more than
    half the documents would be read, every stage is read. Either way the file holds
    the same bytes.
    """
    copies = copies or {}
    withheld = {live[d][1]: f"access allows nobody ({access[d][2]})" for d in live if not access[d][0]}
    order = sorted((d for d in live if access[d][0]), key=lambda d: live[d][1])
    old = previous_digests(store)
    previous_rel, previous_basis = _previous_basis(store) if basis else (None, None)
    reading = None
    if previous_rel is not None and previous_basis == basis:
        reading = _to_read(definition, store, run_id, live, order, old, copies, previous_live)
        if reading is not None and len(reading[0]) * 2 > len(order):
            reading = None  # reading most of it anyway: a rebuild has no copy to make
    if reading is not None and not reading[0] and _unchanged(old, order, access):
        # Every row a copy would write is the published one's, in the same place: the
        # published hand-off and digests stand (no rewrite of the drive's chunks in a
        # quiet week); only the counts are read, and the change set is empty.
        counts, tokens = _counts_of(store, previous_rel)
        store.write_table(changes_rel, schema.CHANGES.empty_table(), run_id=run_id)
        return HandoffResult(sum(counts.values()), sum(tokens.values()), 0, 0,
                             {d: (counts[d], tokens[d]) for d in counts}, withheld, KEPT)
    sch = schema.HANDOFF.with_metadata({BASIS_KEY: basis.encode()}) if basis else schema.HANDOFF
    with store.parquet_writer(chunks_rel, sch, run_id=run_id) as writer:
        out = _Output(writer)
        if reading is not None:
            new = _copy_forward(definition, store, run_id, previous_rel, old, live, access, order, out, copies,
                                reading[0])
        else:
            new = _rebuild(definition, store, run_id, live, access, order, out, copies)
        out.close()
    counts, tokens = out.counts, out.tokens
    if reading is None:
        mode = "rebuilt"
    elif reading[1]:
        mode = f"copied forward, {reading[1]} of {len(order)} documents read from the stages"
    else:
        mode = "access columns rewritten"
    per_doc = {d: (counts[d], tokens[d]) for d in counts}
    fault("handoff-chunks-staged")
    store.write_table(digests_rel, new, run_id=run_id)
    fault("handoff-digests-staged")

    # Upsert: new chunk ids, or any column an index holds changed. Delete: ids gone.
    # Looked up by chunk id (chunk ids are unique in a hand-off; no join engine needed).
    old_digest = pc.take(old.column("digest"), pc.index_in(new.column("chunk_id"), value_set=old.column("chunk_id")))
    changed = pc.or_kleene(pc.is_null(old_digest), pc.not_equal(new.column("digest"), old_digest))
    upserts = new.filter(pc.fill_null(changed, True))
    gone = old.filter(pc.is_null(pc.index_in(old.column("chunk_id"), value_set=new.column("chunk_id"))))

    def _changes(t: pa.Table, action: str) -> pa.Table:
        n = t.num_rows
        return pa.table({"chunk_id": t.column("chunk_id"), "action": pa.array([action] * n, pa.string()),
                         "doc_id": t.column("doc_id"), "source_path": t.column("source_path"),
                         "content_hash": t.column("content_hash"), "run_id": pa.array([run_id] * n, pa.string())},
                        schema=schema.CHANGES)

    changes = pa.concat_tables([_changes(upserts, "upsert"), _changes(gone, "delete")])
    changes = changes.sort_by([("action", "ascending"), ("source_path", "ascending"), ("chunk_id", "ascending")])
    store.write_table(changes_rel, changes, run_id=run_id)
    return HandoffResult(sum(counts.values()), sum(tokens.values()), upserts.num_rows, gone.num_rows, per_doc,
                         withheld, mode)
