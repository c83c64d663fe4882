"""Running a corpus-wide step (one that needs every live document at once).

A corpus step runs once per run over every live document and writes rows only where
its decision is new or changed, so an unchanged week writes next to nothing.

Two calling conventions (steps/spec.py and steps/incremental.py):

- plain: the step gets the full units of every live document and returns units;
  rows are written for documents whose input changed this run, and for other
  documents only where a unit's decision differs from its current row.
- incremental pages (IncrementalPageSpec, the HTML boilerplate step): the step
  sketches only the pages whose input changed this run; for the other live pages of
  the groups concerned it gets back its stored sketch and decision columns (no text);
  only the changed pages and the stored pages whose decision changed are read in full
  and written.
- incremental (IncrementalCorpusSpec): the step sketches only the documents whose
  input changed this run, loaded DOCS_PER_BATCH documents at a time; for the other
  live documents it gets back its own stored rows, only the columns it keeps (read
  as Arrow, no text). Its decisions become rows: a changed document is rewritten
  whole from its input chunks plus the sketch and the decision; a stored chunk whose
  decision changed gets its stored row with the new decision, as a new attempt.
"""

from __future__ import annotations

import hashlib
import json
import time
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from thresher.flows import schema
from thresher.flows.config import FlowDefinition, ResolvedStep
from thresher.flows.encodings import get_encoding
from thresher.flows.execute import Unit, applies_to, load_units, now_utc, stored_read_order, trail, unit_kind
from thresher.flows.inputs import read_chunk_table
from thresher.flows.rows import RowContext, row_to_chunk, rows_to_table, to_row, unit_id
from thresher.flows.store import Store
from thresher.steps.incremental import IncrementalCorpusSpec, IncrementalPageSpec
from thresher.steps.spec import StepContext
from thresher.steps.units import OK, DocChunks, DocPages, clear_stale_count

# Documents whose chunks (with text) are held in memory at once by an incremental
# corpus step, when sketching and again when writing their rows. 250 rather than 1000:
# a run's peak memory then grows 1.27x, not 1.47x, for a 10x larger drive (bench/memory.py);
# a drive of more than one batch reads its changed chunks twice.
DOCS_PER_BATCH = 250
# The same for an incremental page step (HTML pages: one page each, no signatures).
# Larger, because each read of the stage before costs about 0.16 s however few
# documents it holds (2,000 pages, bench/sitefolder.py: 18 reads took 4.5 s of the
# step's 5.7 s at 250); 2,000 pages held about 36 MB there (tracemalloc).
PAGE_DOCS_PER_BATCH = 2000


@dataclass
class CorpusResult:
    stage: str
    affected_docs: set[str]  # documents whose ok units changed: the next segment's to redo
    counts: dict[str, int]
    rows_written: int
    seconds: float
    read: int | None = None  # documents whose units were loaded (a plain step)
    notes: list[str] = field(default_factory=list)  # lines for the run's log (an incremental page step)


def live_inputs(live_docs: dict[str, tuple[int, str, int]]) -> bytes:
    """Every live document's rank, path and modification time, encoded once per run
    for the corpus steps' inputs keys (a drive's worth of JSON, not one per step)."""
    return json.dumps(sorted(live_docs.items()), separators=(",", ":")).encode()


def inputs_key(step: ResolvedStep, live: bytes) -> str:
    """What a corpus step's decisions depend on besides its input rows: the step and
    every step before it (its digest) and the live documents (`live`, from
    live_inputs). Recorded per run in the manifest (`corpus_inputs`)."""
    h = hashlib.sha256(step.digest.encode())
    h.update(live)
    return h.hexdigest()


def stored_result(definition: FlowDefinition, store: Store, run_id: str, index: int, key: str,
                  previous: dict[str, Any] | None, rewrite: set[str], affected: set[str],
                  live_docs: dict[str, tuple[int, str, int]],
                  previous_live: dict[str, str | None] | None) -> CorpusResult | None:
    """The latest run's result for the corpus step at `index` when its inputs are as
    that run left them, so it would decide the same and its stored rows stand; else None.

    Inputs as left: no document's input rows written in this run (`rewrite`), no
    earlier corpus step's rows changed (`affected`), and the same inputs_key (`key`)
    as `previous` (the latest committed run's manifest) recorded.

    A page step limited to some formats (the HTML boilerplate step) gets only the
    pages, paths and ranks of documents of those formats (no modification time), so
    for it the inputs are also as left when none of the documents this run wrote,
    changed in an earlier corpus step, added, removed or moved is of those formats
    (by the first stage's format column, read for those documents only), under the
    same chain. Such a step is expected to depend on the order of ranks, not on
    their values (a removal elsewhere shifts the values, never the order).
    """
    step = definition.steps[index]
    before = (previous or {}).get("corpus_inputs") or {}
    if step.name not in before:
        return None
    stored = CorpusResult(step.name, set(), dict((previous or {}).get("written", {}).get(step.name, {})), 0, 0.0)
    if not rewrite and not affected and before[step.name] == key:
        return stored
    if (not step.spec.formats or unit_kind(step) != "pages" or previous_live is None
            or previous.get("chain_digest") != definition.chain_digest):
        return None
    changed = sorted(_changed(rewrite, affected, live_docs, previous_live))
    formats = _formats(store, definition, changed, run_id)
    if any(formats.get(d) is None or formats[d] in step.spec.formats for d in changed):
        return None
    return stored


def _changed(rewrite: set[str], affected: set[str], live_docs: dict[str, tuple[int, str, int]],
             previous_live: dict[str, str | None]) -> set[str]:
    """Documents written this run, changed by an earlier corpus step, added, moved or removed."""
    moved = {d for d, v in live_docs.items() if previous_live.get(d) != v[1]}
    return set(rewrite) | set(affected) | moved | (set(previous_live) - set(live_docs))


def changed_groups(definition: FlowDefinition, index: int, previous: dict[str, Any] | None, rewrite: set[str],
                   affected: set[str], live_docs: dict[str, tuple[int, str, int]],
                   previous_live: dict[str, str | None] | None) -> set[str] | None:
    """For a plain corpus step with groups (StepSpec.group) that the latest run ran or
    kept under the same chain: the groups holding a changed document, at its live
    path now and its path then (its other groups' stored decisions stand). None: all."""
    step = definition.steps[index]
    if (step.spec.group is None or isinstance(step.spec, IncrementalCorpusSpec) or previous_live is None
            or step.name not in ((previous or {}).get("corpus_inputs") or {})
            or previous.get("chain_digest") != definition.chain_digest):
        return None
    paths = set()
    for d in _changed(rewrite, affected, live_docs, previous_live):
        if d in live_docs:
            paths.add(live_docs[d][1])
        if previous_live.get(d):
            paths.add(previous_live[d])
    return {step.spec.group(p, step.params) for p in paths}


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
                    live_docs: dict[str, tuple[int, str, int]], rewrite_docs: set[str],
                    groups: set[str] | None = None, sketched: list[pa.Table] | None = None) -> CorpusResult:
    """Run the corpus-wide step at `index` over all live documents.

    live_docs maps doc_id -> (rank, source path). Documents in rewrite_docs get every
    unit written (their input changed this run); for the rest only units whose
    decision changed are written, so unchanged weeks write next to nothing.
    `sketched`: an incremental step's sketches the workers made this run (execute.BatchRunner).
    """
    t0 = time.perf_counter()
    step = definition.steps[index]
    if isinstance(step.spec, IncrementalCorpusSpec):
        return _run_incremental(definition, store, run_id, index, live_docs, rewrite_docs, sketched)
    if isinstance(step.spec, IncrementalPageSpec):
        return _run_incremental_pages(definition, store, run_id, index, live_docs, rewrite_docs, groups)
    kind = unit_kind(step)
    wanted = _of_formats(store, definition, step, sorted(live_docs), run_id)
    stored: Counter[str] = Counter()
    if groups is not None:
        # Other groups' documents are not loaded: their stored decisions stand, and
        # only their statuses are read, for the counts.
        inside = {d: step.spec.group(live_docs[d][1], step.params) in groups for d in wanted}
        others = [d for d in wanted if not inside[d]]
        wanted = [d for d in wanted if inside[d]]
        if others:
            stored.update(store.current(step.name, kind, others, columns=["status"], include_run=run_id)
                          .column("status").to_pylist())
    loaded = load_units(store, definition, index, wanted, run_id)
    loaded = {d: v for d, v in loaded.items() if d in live_docs and v.units and applies_to(step, v.units)}
    if kind == "chunks":
        docs: list[Any] = [DocChunks(d, live_docs[d][1], live_docs[d][0], list(v.units), live_docs[d][2])
                           for d, v in loaded.items()]
    else:
        docs = [DocPages(d, live_docs[d][1], live_docs[d][0], list(v.units)) for d, v in loaded.items()]
    docs.sort(key=lambda d: (d.rank, d.source_path))
    ctx = StepContext(encoding=get_encoding)
    started = now_utc()
    out = step.spec.run(docs, step.params, ctx) if docs else []

    by_doc: dict[str, list[Unit]] = defaultdict(list)
    if kind == "chunks":
        owner = {c.chunk_id: d.doc_id for d in docs for c in d.chunks}
        came_from = {c.chunk_id: c for d in docs for c in d.chunks}
        for chunk in out:
            clear_stale_count(came_from.get(chunk.chunk_id), chunk)
            by_doc[owner[chunk.chunk_id]].append(chunk)
    else:
        for doc_pages in out:  # a page step returns DocPages: pages do not name their document
            by_doc[doc_pages.doc_id].extend(doc_pages.pages)

    # Rewritten documents are written whole; only the others are compared with their rows.
    compared = sorted(set(by_doc) - set(rewrite_docs))
    current = store.current(step.name, kind, compared, include_run=run_id) if compared else None
    payload_names = [f.name for f in schema.payload_fields(step.name, kind)]
    before = {r["unit_id"]: _decision(r, payload_names) for r in current.to_pylist()} if current else {}
    attempts = store.max_attempts(step.name, kind, sorted(by_doc))

    all_rows: list[dict[str, Any]] = []
    writes: list[tuple[str, str]] = []
    affected: set[str] = set()
    counts: dict[str, int] = dict(stored)
    for doc_id, units in sorted(by_doc.items()):
        rctx = RowContext(run_id, doc_id, live_docs[doc_id][1], step.name, step.spec.version, step.digest,
                          kind, loaded[doc_id].stage, started, None, attempts)
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
    return CorpusResult(step.name, affected, counts, len(all_rows), time.perf_counter() - t0, len(docs))


def _of_formats(store: Store, definition: FlowDefinition, step: ResolvedStep, doc_ids: list[str],
                run_id: str) -> list[str]:
    """The documents a format-limited step applies to (by the first stage's format
    column, no text read), so the others' units are never loaded: on a drive of few
    HTML pages the HTML-only step holds those pages, not the drive."""
    if not step.spec.formats or not doc_ids:
        return doc_ids
    return sorted(d for d, f in _formats(store, definition, doc_ids, run_id).items() if f in step.spec.formats)


def _formats(store: Store, definition: FlowDefinition, doc_ids: list[str], run_id: str) -> dict[str, str | None]:
    """doc_id -> format, from the first stage's format column (no text read)."""
    if not doc_ids:
        return {}
    first = definition.steps[0]
    t = store.current(first.name, first.spec.produces, doc_ids, columns=["doc_id", "format"], include_run=run_id)
    return dict(zip(t.column("doc_id").to_pylist(), t.column("format").to_pylist()))


# ----------------------------------------------------------------------------- incremental


def _batches(items: list[str], size: int) -> list[list[str]]:
    return [items[i:i + size] for i in range(0, len(items), size)]


# The columns of a chunk's stored row that a corpus chunk step's own row is made from
# (the unit's columns and the common columns it keeps or derives from).
_INPUT_COLUMNS = ["doc_id", "unit_id", "locator", "status", *(f.name for f in schema.CHUNK_COLUMNS)]


def _read_inputs(store: Store, definition: FlowDefinition, index: int, doc_ids: list[str],
                 run_id: str) -> pa.Table:
    """These documents' ok chunks from the stage before, as rows in Arrow, in the order the
    step receives them (documents of no format the step takes are left out)."""
    step = definition.steps[index]
    table = read_chunk_table(store, trail(definition, index), doc_ids, run_id, _INPUT_COLUMNS)
    if step.spec.formats and table.num_rows:
        takes = pc.is_in(table.column("format"), pa.array(sorted(step.spec.formats)))
        wanted = pc.unique(table.filter(takes).column("doc_id"))
        table = table.filter(pc.is_in(table.column("doc_id"), wanted))
    return table


def _docs_of(table: pa.Table, doc_ids: list[str], live_docs: dict[str, tuple[int, str, int]]) -> list[DocChunks]:
    """Some documents of an input table as the step's DocChunks (Python objects)."""
    wanted = set(doc_ids)
    rows = table.filter(pc.is_in(table.column("doc_id"), pa.array(sorted(wanted), pa.string()))).to_pylist()
    chunks: dict[str, list] = defaultdict(list)
    for row in rows:
        chunks[row["doc_id"]].append(row_to_chunk(row))
    return [DocChunks(d, live_docs[d][1], live_docs[d][0], chunks[d], live_docs[d][2]) for d in doc_ids if chunks[d]]


def _check_sketch(step: ResolvedStep, table: pa.Table, expected: int) -> pa.Table:
    spec = step.spec
    need = ["doc_id", "chunk_id", "chunk_index", *spec.sketch_columns]
    missing = [c for c in need if c not in table.column_names]
    if missing:
        raise ValueError(f"step {step.name}: sketch lacks columns {missing}")
    if table.num_rows != expected:
        raise ValueError(f"step {step.name}: sketch gave {table.num_rows} rows for {expected} ok chunks")
    sch = schema.stage_schema(step.name, "chunks")
    return table.select(need).cast(pa.schema([sch.field(c) for c in need]))


@dataclass
class _Made:
    """Sketches the workers made (segment.sketch_here), one table, with each document's rows."""

    table: pa.Table | None = None
    rows: dict[str, list[int]] = field(default_factory=dict)
    chunk_ids: list[str] = field(default_factory=list)

    @classmethod
    def of(cls, tables: list[pa.Table] | None) -> "_Made":
        if not tables:
            return cls()
        table = pa.concat_tables(tables).combine_chunks()
        return cls(table, _rows_by_doc(table), table.column("chunk_id").to_pylist())

    def sketch(self, step: ResolvedStep, inputs: pa.Table, live_docs: dict[str, tuple[int, str, int]],
               ctx: StepContext) -> pa.Table:
        """The sketch of the documents of this input table: a worker's where it covers
        exactly the document's ok chunks as read here (not a document sketched twice, or
        whose chunks the store holds otherwise), the step's own for the rest, which
        alone are made into Python objects."""
        take: list[int] = []
        todo: list[str] = []
        for doc_id, ids in _chunk_ids_by_doc(inputs).items():
            rows = self.rows.get(doc_id)
            if rows is not None and [self.chunk_ids[i] for i in rows] == ids:
                take.extend(rows)
            else:
                todo.append(doc_id)
        parts = [self.table.take(pa.array(take, pa.int64()))] if take else []
        if todo:
            parts.append(step.spec.sketch(_docs_of(inputs, todo, live_docs), step.params, ctx))
        return parts[0] if len(parts) == 1 else pa.concat_tables(parts, promote_options="default")


def _chunk_ids_by_doc(inputs: pa.Table) -> dict[str, list[str]]:
    """Each document's chunk ids in the input table's order (documents in order too)."""
    out: dict[str, list[str]] = {}
    for d, c in zip(inputs.column("doc_id").to_pylist(), inputs.column("chunk_id").to_pylist()):
        out.setdefault(d, []).append(c)
    return out


def _with_place(table: pa.Table, live_docs: dict[str, tuple[int, str, int]], fresh: bool) -> pa.Table:
    """Add each row's document rank, current path and its modification time, and
    whether it is fresh."""
    ids = table.column("doc_id").to_pylist()
    return table.append_column("rank", pa.array([live_docs[d][0] for d in ids], pa.int64())) \
        .append_column("source_path", pa.array([live_docs[d][1] for d in ids], pa.string())) \
        .append_column("modified", pa.array([live_docs[d][2] for d in ids], pa.int64())) \
        .append_column("fresh", pa.array([fresh] * len(ids), pa.bool_()))


@dataclass
class _Positions:
    """Where each (doc_id, chunk_id) of a table is, and the documents it holds."""

    at: dict[tuple[str, str], int]
    docs: set[str]

    def of(self, doc_ids: list[str], chunk_ids: list[str], step: str, paths: list[str]) -> pa.Array:
        """The positions of these chunks; a chunk missing fails the step, naming its file."""
        found = [self.at.get(k) for k in zip(doc_ids, chunk_ids)]
        if None in found:
            missing = [i for i, f in enumerate(found) if f is None]
            raise ValueError(f"step {step}: no sketch or decision for {len(missing)} chunk(s) of "
                             f"{paths[missing[0]]}")
        return pa.array(found, pa.int64())


def _positions(table: pa.Table | None) -> _Positions:
    if table is None:
        return _Positions({}, set())
    at = {k: i for i, k in enumerate(zip(table.column("doc_id").to_pylist(), table.column("chunk_id").to_pylist()))}
    return _Positions(at, {d for d, _ in at})


def _fresh_rows(step: ResolvedStep, inputs: pa.Table, sketch: pa.Table,
                sketch_at: _Positions, decisions: pa.Table | None, decision_at: _Positions,
                live_docs: dict[str, tuple[int, str, int]], attempts: dict[str, int],
                same: dict[str, Any]) -> pa.Table:
    """Rewritten documents' rows, made in Arrow from their input rows: what rows.chunk_row
    makes of each input chunk (read back as rows.row_to_chunk reads it) as the step's
    unit: lineage to the input row, the input's chunk columns, the sketch's and the
    decision's columns as payload, the decision's status and reason. (Made as Python
    objects and rows before: 7.7 of the 15 s dedup took on a documentation drive's
    first run of 55,688 chunks, under cProfile.)"""
    spec: IncrementalCorpusSpec = step.spec  # type: ignore[assignment]
    sch = schema.stage_schema(step.name, "chunks")
    names = {f.name for f in schema.payload_fields(step.name, "chunks")}
    unknown = sorted(set(spec.sketch_columns + spec.decision_columns) - names)
    if step.name not in schema.STAGE_PAYLOAD or unknown:
        raise ValueError(f"step {step.name}: its sketch and decision columns {unknown or ''} need columns of "
                         "their own in flows/schema.py (STAGE_PAYLOAD)")
    n = inputs.num_rows
    docs = inputs.column("doc_id").to_pylist()
    locators = inputs.column("locator").to_pylist()
    ids = inputs.column("chunk_id").to_pylist()
    paths = [live_docs[d][1] for d in docs]
    sk = sketch.take(sketch_at.of(docs, ids, step.name, paths))
    if decisions is None:
        raise ValueError(f"step {step.name}: no sketch or decision for {n} chunk(s) of {paths[0]}")
    dec = decisions.take(decision_at.of(docs, ids, step.name, paths))
    uids = [unit_id(d, step.name, loc) for d, loc in zip(docs, locators)]
    status = dec.column("status")
    reason = pc.if_else(pc.equal(status, OK), pa.scalar(None, pa.string()),
                        pc.if_else(pc.equal(dec.column("reason"), ""), pa.scalar(None, pa.string()),
                                   dec.column("reason")))
    chunk_id = inputs.column("chunk_id")
    empty_id = pc.or_kleene(pc.is_null(chunk_id), pc.equal(chunk_id, ""))
    heading = inputs.column("heading_path")
    if heading.null_count:
        heading = pa.array([h or [] for h in heading.to_pylist()], schema.STR_LIST)
    values: dict[str, Any] = {
        "run_id": [same["run_id"]] * n,
        "doc_id": inputs.column("doc_id"),
        "source_path": paths,
        "unit_id": uids,
        "parent_ids": [[u] for u in inputs.column("unit_id").to_pylist()],  # the input row's own id
        "locator": inputs.column("locator"),
        "page": inputs.column("page_start"),
        "step": [step.name] * n,
        "step_version": [spec.version] * n,
        "config_digest": [step.digest] * n,
        "status": status,
        "reason": reason,
        "attempt": [attempts.get(u, 0) + 1 for u in uids],
        "started_at": [same["started_at"]] * n,
        "warnings": [[]] * n,
        "chunk_id": pc.if_else(pc.fill_null(empty_id, True), pa.array(uids, pa.string()), chunk_id),
        "heading_path": heading,
    }
    for name, blank in (("chunk_index", 0), ("text", ""), ("char_start", 0), ("char_end", 0),
                        ("prefix_chars", 0), ("title", ""), ("format", "")):
        values[name] = pc.fill_null(inputs.column(name), blank)
    for name in ("page_start", "page_end", "language", "language_prob", "token_count", "encoding"):
        values[name] = inputs.column(name)
    values.update({c: sk.column(c) for c in spec.sketch_columns})
    values.update({c: dec.column(c) for c in spec.decision_columns})
    columns = []
    for f in sch:
        v = values.get(f.name)
        if v is None:  # error_type, traceback, duration_ms, document_ms, payload the step gave none of
            columns.append(pa.nulls(n, f.type))
        elif isinstance(v, list):
            columns.append(pa.array(v, f.type))
        else:
            columns.append(v.cast(f.type))
    return pa.Table.from_arrays(columns, schema=sch)


def _by_chunk(table: pa.Table, rows: list[int]) -> dict[tuple[str, str], dict[str, Any]]:
    """These rows of the table (one take), as (doc_id, chunk_id) -> row."""
    return {(r["doc_id"], r["chunk_id"]): r for r in table.take(pa.array(rows, pa.int64())).to_pylist()}


def _rows_by_doc(table: pa.Table) -> dict[str, list[int]]:
    out: dict[str, list[int]] = defaultdict(list)
    for i, d in enumerate(table.column("doc_id").to_pylist()):
        out[d].append(i)
    return out


def _run_incremental(definition: FlowDefinition, store: Store, run_id: str, index: int,
                     live_docs: dict[str, tuple[int, str, int]], rewrite_docs: set[str],
                     sketched: list[pa.Table] | None = None) -> CorpusResult:
    t0 = time.perf_counter()
    step = definition.steps[index]
    spec: IncrementalCorpusSpec = step.spec  # type: ignore[assignment]
    kind = "chunks"
    ctx = StepContext(encoding=get_encoding)
    started = now_utc()
    rewritten = sorted(set(rewrite_docs) & set(live_docs))
    unchanged = sorted(set(live_docs) - set(rewrite_docs))

    # Stored rows of unchanged documents: only the columns the step keeps, no text.
    kept = store.current(step.name, kind, unchanged, columns=list(spec.kept_columns), include_run=run_id) \
        if unchanged else schema.stage_schema(step.name, kind).empty_table().select(list(spec.kept_columns))
    held = set(pc.unique(kept.column("doc_id")).to_pylist()) if kept.num_rows else set()
    # An unchanged document this stage holds nothing of may still have chunks upstream.
    fresh_ids = rewritten + [d for d in unchanged if d not in held]

    sketches: list[pa.Table] = []
    in_order = stored_read_order(definition, store, index, fresh_ids, run_id, DOCS_PER_BATCH) or fresh_ids
    batches = _batches(in_order, DOCS_PER_BATCH)
    # With a single batch (the usual week) its input rows are kept for writing the rows;
    # with more they are let go and read again, so memory holds one batch at a time.
    kept_batch: pa.Table | None = None
    made = _Made.of(sketched)
    for batch in batches:
        inputs = _read_inputs(store, definition, index, batch, run_id)
        if inputs.num_rows:
            sketches.append(_check_sketch(step, made.sketch(step, inputs, live_docs, ctx), inputs.num_rows))
        if len(batches) == 1:
            kept_batch = inputs
    del made
    parts = [_with_place(t, live_docs, True) for t in sketches]
    if kept.num_rows:
        parts.append(_with_place(kept, live_docs, False))
    if not parts and not rewritten:
        return CorpusResult(step.name, set(), {}, 0, time.perf_counter() - t0)
    table = pa.concat_tables(parts, promote_options="default") if parts else None
    decisions = spec.decide(table, step.params, ctx) if table is not None and table.num_rows else None
    if decisions is not None:
        missing = [c for c in ("doc_id", "chunk_id", "status", "reason", *spec.decision_columns)
                   if c not in decisions.column_names]
        if missing:
            raise ValueError(f"step {step.name}: decisions lack columns {missing}")

    dec_rows = _rows_by_doc(decisions) if decisions is not None else {}
    fresh_sketch = pa.concat_tables(sketches).combine_chunks() if sketches else None
    del sketches, table
    affected: set[str] = set()
    counts: Counter[str] = Counter()
    written = 0
    part = 0

    # Documents whose input changed: rewritten whole, from their input rows.
    fresh_set = set(fresh_ids)
    rewritten_set = set(rewritten)
    sketch_at = _positions(fresh_sketch)
    decision_at = _positions(decisions)
    for batch in batches:
        if kept_batch is not None:
            inputs = kept_batch
        elif any(d in sketch_at.docs for d in batch):
            inputs = _read_inputs(store, definition, index, [d for d in batch if d in sketch_at.docs], run_id)
        else:
            inputs = None
        if inputs is not None and inputs.num_rows:
            doc_ids = pc.unique(inputs.column("doc_id")).to_pylist()
            rows_t = _fresh_rows(step, inputs, fresh_sketch, sketch_at, decisions, decision_at, live_docs,
                                 store.max_attempts(step.name, kind, doc_ids),
                                 {"run_id": run_id, "started_at": started})
            counts.update(rows_t.column("status").to_pylist())
            affected.update(doc_ids)
        else:
            doc_ids, rows_t = [], schema.stage_schema(step.name, kind).empty_table()
        # A rewritten document with no chunks now still retires its older rows.
        writes = sorted({(d, "document") for d in batch if d in rewritten_set} | {(d, "document") for d in doc_ids})
        if writes:
            store.write_stage_part(step.name, run_id, f"corpus-{part:05d}", rows_t, writes)
            part += 1
            written += rows_t.num_rows

    # Stored chunks of unchanged documents whose decision changed: their row, decided anew.
    revised_docs = sorted(d for d in dec_rows if d not in fresh_set)
    revised = _by_chunk(decisions, [i for d in revised_docs for i in dec_rows[d]]) if revised_docs else {}
    if revised_docs:
        rows_t, ok_changed = _revised_rows(
            store.current(step.name, kind, revised_docs, include_run=run_id), revised,
            store.max_attempts(step.name, kind, revised_docs), live_docs,
            {"run_id": run_id, "step_version": spec.version, "config_digest": step.digest, "started_at": started},
            spec.decision_columns)
        affected |= ok_changed
        if rows_t.num_rows != len(revised):
            raise ValueError(f"step {step.name}: decided about {len(revised) - rows_t.num_rows} chunk(s) it was "
                             "not given")
        store.write_stage_part(step.name, run_id, f"corpus-{part:05d}", rows_t,
                               [(d, "units" if d in ok_changed else schema.SET_ASIDE) for d in revised_docs])
        written += rows_t.num_rows

    # Counts over every live chunk the stage now holds: stored ones as decided.
    if kept.num_rows:
        stored_status = kept.column("status").to_pylist()
        stored_ids = kept.column("chunk_id").to_pylist()
        stored_docs = kept.column("doc_id").to_pylist()
        for d, c, s in zip(stored_docs, stored_ids, stored_status):
            new = revised.get((d, c))
            counts[new["status"] if new is not None else s] += 1
    return CorpusResult(step.name, affected, dict(counts), written, time.perf_counter() - t0)


def _revised_rows(current: pa.Table, revised: dict[tuple[str, str], dict[str, Any]], attempts: dict[str, int],
                  live_docs: dict[str, tuple[int, str, int]], same: dict[str, Any],
                  decision_columns: tuple[str, ...] | list[str]) -> tuple[pa.Table, set[str]]:
    """The stored rows of chunks whose decision changed, decided anew: their stored
    columns kept as they are in Arrow (text, signatures) and the run's (`same`), the
    outcome's and the decision's columns replaced; and the documents one of whose ok
    units changed. (Built as Python rows before: 0.85 s of a documentation drive's
    week, for 179 documents revised.)"""
    keys = list(zip(current.column("doc_id").to_pylist(), current.column("chunk_id").to_pylist()))
    hit = [i for i, k in enumerate(keys) if k in revised]
    t = current.take(pa.array(hit, pa.int64()))
    news = [revised[keys[i]] for i in hit]
    docs = [keys[i][0] for i in hit]
    # The steps after take a document's ok units: only a document whose ok units
    # changed is theirs to redo. A unit that stays set aside (a duplicate whose
    # canonical chunk moved) changes this row alone: on a documentation drive, 19
    # changed files revised 937 rows of 226 documents, nearly all of them such pointers.
    ok_changed = {d for d, old_status, new in zip(docs, t.column("status").to_pylist(), news)
                  if OK in (old_status, new["status"])}
    n = t.num_rows
    values: dict[str, list[Any]] = {name: [v] * n for name, v in same.items()}
    values.update(source_path=[live_docs[d][1] for d in docs], status=[r["status"] for r in news],
                  reason=[r["reason"] for r in news], error_type=[None] * n, traceback=[None] * n,
                  attempt=[attempts.get(u, 0) + 1 for u in t.column("unit_id").to_pylist()],
                  duration_ms=[None] * n, document_ms=[None] * n)
    values.update({c: [r[c] for r in news] for c in decision_columns})
    for name, column in values.items():
        at = t.schema.get_field_index(name)
        t = t.set_column(at, t.schema.field(at), pa.array(column, t.schema.field(at).type))
    return t, ok_changed


# ----------------------------------------------------------------------------- incremental pages


def _load_pages(store: Store, definition: FlowDefinition, index: int, doc_ids: list[str],
                live_docs: dict[str, tuple[int, str, int]], run_id: str) -> tuple[list[DocPages], dict[str, str]]:
    """These documents' ok pages from the stage before, and which stage each came from."""
    step = definition.steps[index]
    loaded = load_units(store, definition, index, doc_ids, run_id)
    docs, stages = [], {}
    for d in doc_ids:
        got = loaded.get(d)
        if got is None or not got.units or not applies_to(step, got.units):
            continue
        docs.append(DocPages(d, live_docs[d][1], live_docs[d][0], list(got.units)))
        stages[d] = got.stage
    return docs, stages


def _run_incremental_pages(definition: FlowDefinition, store: Store, run_id: str, index: int,
                           live_docs: dict[str, tuple[int, str, int]], rewrite_docs: set[str],
                           groups: set[str] | None) -> CorpusResult:
    """An IncrementalPageSpec: sketch the changed pages, decide over them plus the
    stored sketches of the other pages of their groups, and make again from their
    inputs only the changed pages and the stored pages whose decision changed."""
    t0 = time.perf_counter()
    step = definition.steps[index]
    spec: IncrementalPageSpec = step.spec  # type: ignore[assignment]
    kind = "pages"
    ctx = StepContext(encoding=get_encoding)
    started = now_utc()
    wanted = sorted(live_docs)
    counts: Counter[str] = Counter()
    if groups is not None:
        # Other groups' decisions stand; only their statuses are read, for the counts
        # (a document of another format has no row here).
        inside = {d: spec.group(live_docs[d][1], step.params) in groups for d in wanted}
        others = [d for d in wanted if not inside[d]]
        wanted = [d for d in wanted if inside[d]]
        if others:
            counts.update(store.current(step.name, kind, others, columns=["status"], include_run=run_id)
                          .column("status").to_pylist())
    # Stored rows of the groups' pages: the step's own narrow columns, no text. A
    # document with rows here is of the step's formats; only the others' formats are read.
    stored = store.current(step.name, kind, wanted, columns=list(spec.kept_columns), include_run=run_id) \
        if wanted else schema.stage_schema(step.name, kind).empty_table().select(list(spec.kept_columns))
    held = set(pc.unique(stored.column("doc_id")).to_pylist()) if stored.num_rows else set()
    new = set(_of_formats(store, definition, step, [d for d in wanted if d not in held], run_id))
    wanted = [d for d in wanted if d in held or d in new]
    fresh_ids = [d for d in wanted if d in rewrite_docs or d not in held]
    if fresh_ids and stored.num_rows:  # a rewritten document's stored rows are stale
        stored = stored.filter(pc.invert(pc.is_in(stored.column("doc_id"), pa.array(fresh_ids, pa.string()))))

    sketches: list[pa.Table] = []
    batches = _batches(fresh_ids, PAGE_DOCS_PER_BATCH)
    kept_batch: tuple[list[DocPages], dict[str, str]] | None = None  # the usual week: one batch, kept
    for batch in batches:
        docs, stages = _load_pages(store, definition, index, batch, live_docs, run_id)
        if docs:
            sketches.append(spec.sketch(docs, step.params, ctx).select(["doc_id", "locator", *spec.sketch_columns]))
        if len(batches) == 1:
            kept_batch = (docs, stages)
    sch = schema.stage_schema(step.name, kind)
    decision_types = [sch.field(c).type for c in spec.decision_columns]

    def placed(t: pa.Table, fresh: bool) -> pa.Table:
        ids = t.column("doc_id").to_pylist()
        t = t.append_column("source_path", pa.array([live_docs[d][1] for d in ids], pa.string())) \
            .append_column("fresh", pa.array([fresh] * len(ids), pa.bool_()))
        if fresh:
            for c, typ in zip(spec.decision_columns, decision_types):
                t = t.append_column(c, pa.nulls(t.num_rows, typ))
        t = t.select(["doc_id", "locator", "source_path", "fresh", *spec.sketch_columns, *spec.decision_columns])
        return t.cast(pa.schema([f.with_nullable(True) for f in t.schema]))

    parts = [placed(t, True) for t in sketches] + ([placed(stored, False)] if stored.num_rows else [])
    table = pa.concat_tables(parts) if parts else None
    decisions = spec.decide(table, step.params, ctx) if table is not None else None
    notes = spec.describe(table, step.params, ctx) if table is not None and spec.describe is not None else []
    decided: dict[str, dict[str, dict]] = defaultdict(dict)
    for r in (decisions.to_pylist() if decisions is not None else []):
        decided[r["doc_id"]][r["locator"]] = r
    # Stored decisions of the pages not decided anew (a document partly revised keeps them).
    stored_by_doc: dict[str, dict[str, dict]] = defaultdict(dict)
    status_of: dict[tuple[str, str], str] = {}
    for r in stored.select(["doc_id", "locator", "status", *spec.decision_columns]).to_pylist():
        stored_by_doc[r["doc_id"]][r["locator"]] = r
        status_of[(r["doc_id"], r["locator"])] = r["status"]
    fresh_set = set(fresh_ids)
    revised = sorted(d for d in decided if d not in fresh_set)

    affected: set[str] = set()
    written, part, read = 0, 0, 0
    new_status: dict[tuple[str, str], str] = {}
    # Fresh documents are written whole; revised ones only in their revised pages.
    jobs = [(b, True) for b in batches] + [(b, False) for b in _batches(revised, PAGE_DOCS_PER_BATCH)]
    for batch, fresh in jobs:
        if fresh and kept_batch is not None:
            docs, stages = kept_batch
        else:
            docs, stages = _load_pages(store, definition, index, batch, live_docs, run_id)
        read += len(docs)
        attempts = store.max_attempts(step.name, kind, [d.doc_id for d in docs]) if docs else {}
        rows: list[dict[str, Any]] = []
        writes: set[tuple[str, str]] = {(d, "document") for d in batch} if fresh else set()
        for doc in docs:
            mine = {**stored_by_doc.get(doc.doc_id, {}), **decided.get(doc.doc_id, {})}
            missing = [p.locator for p in doc.pages if p.locator not in mine]
            if missing:
                raise ValueError(f"step {step.name}: no decision for {len(missing)} page(s) of {doc.source_path}")
            out = spec.apply(doc, mine, step.params, ctx)
            units = out.pages if fresh else [p for p in out.pages if p.locator in decided.get(doc.doc_id, {})]
            rctx = RowContext(run_id, doc.doc_id, live_docs[doc.doc_id][1], step.name, spec.version, step.digest,
                              kind, stages[doc.doc_id], started, None, attempts)
            rows.extend(to_row(rctx, u) for u in units)
            for u in units:
                new_status[(doc.doc_id, u.locator)] = u.status
            if not fresh and units:
                writes.add((doc.doc_id, "units"))
            affected.add(doc.doc_id)
        if writes:
            store.write_stage_part(step.name, run_id, f"corpus-{part:05d}", rows_to_table(step.name, kind, rows),
                                   sorted(writes))
            part += 1
            written += len(rows)
    # Counts over every live page the groups hold: stored ones as decided.
    for key, s in status_of.items():
        counts[new_status.get(key, s)] += 1
    for key, s in new_status.items():
        if key not in status_of:
            counts[s] += 1
    return CorpusResult(step.name, affected, dict(counts), written, time.perf_counter() - t0, read, notes)
