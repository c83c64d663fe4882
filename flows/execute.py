"""Running steps over documents and writing what they decide. No Prefect here.

A batch runs a segment of the chain (consecutive document-scope steps) for a few
documents and writes one Parquet part per stage. Corpus steps are in corpus.py.

A step limited to some formats (StepSpec.formats) is passed by for other documents:
it writes no rows for them, and the next step reads the stage before it.
"""

from __future__ import annotations

import hashlib
import time
from collections import defaultdict
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pyarrow as pa

from thresher.flows.config import FlowDefinition, ResolvedStep
from thresher.flows.encodings import get_encoding
from thresher.flows.inputs import Loaded, ReadFrom, Stage, StoredInputs, read_order, read_units
from thresher.flows.isolate import (ChildCrashed, IsolatedCaller, NotSendable, RemoteError, TimeLimitExceeded,
                                    claim_waiting, give_back, idle_count, isolation_available, prewarm,
                                    take_worker)
from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.flows.segment import (SKETCH_TAG, PassedOn, Sketched, StepCall, StepDone, as_next_inputs,
                                    failed_document_unit, order_key, run_segment)
from thresher.flows.store import Store
from thresher.steps.incremental import IncrementalCorpusSpec
from thresher.steps.spec import StepContext
from thresher.steps.units import DOCUMENT_LOCATOR, Chunk, Page, Source

Unit = Page | Chunk


@dataclass
class DocJob:
    doc_id: str
    source_path: str
    abs_path: str
    size: int
    mtime: float
    start: int  # index of the first step to run for this document
    known: bool  # the store may already hold rows of this document
    # A re-run of chosen units: the first step keeps only these locators of its output
    # and the rest of that stage stays as stored (None: the whole document).
    only: list[str] | None = None
    # A document inside a document: `abs_path` is the drive file that holds it and
    # `member_of` the member names from there down to it. `data`: the bytes already in
    # hand, hashed to give doc_id (a member when its container was just read in this
    # batch, else unpacked again from abs_path; a file the scan read to hash it).
    member_of: tuple[str, ...] = ()
    data: bytes | None = None


@dataclass
class MemberInfo:
    """A document found inside another one during extraction, for the catalog."""

    source_path: str
    doc_id: str
    size: int
    mtime: float
    container_doc_id: str
    member_name: str
    processed: bool  # read in this run (False: the store holds it with this chain already)


@dataclass
class BatchJob:
    run_id: str
    store_root: str
    # Step indices: consecutive document-scope steps, possibly followed by a corpus
    # step limited to some formats and the document steps after it, which a document
    # goes on to when that step passes it by (pipeline.onward); they hold no other
    # corpus step.
    segment: list[int]
    part: str
    docs: list[DocJob]
    force: bool = False  # read documents found inside containers even if the store has them


@dataclass
class BatchResult:
    part: str
    documents: int = 0
    counts: dict[str, dict[str, int]] = field(default_factory=dict)  # stage -> status -> n
    step_seconds: float = 0.0
    seconds: float = 0.0
    failures: list[tuple[str, str, str]] = field(default_factory=list)  # path, stage, reason
    members: list[MemberInfo] = field(default_factory=list)
    # Documents that went on past the segment's corpus step (it passes them by): the
    # document segment after that step has run for them already.
    through: list[str] = field(default_factory=list)
    # Sketches the workers made for the incremental corpus step right after the
    # segment: step index -> one table for the batch (corpus.run_corpus_step takes them).
    sketches: dict[int, Any] = field(default_factory=dict)


def now_utc() -> datetime:
    return datetime.now(timezone.utc)


def unit_kind(step: ResolvedStep) -> str:
    return step.spec.produces


_order_key = order_key

def local_workers(kind: str, workers: int) -> int:
    """Warm workers the batches use at once in this process: 0 where they run in other
    processes (a process pool, Dask)."""
    return {"sequential": 1, "threads": workers}.get(kind, 0)


def prewarm_run(definition: FlowDefinition, source_root: str, store_root: str, workers: int | None,
                force: bool) -> None:
    """Start this process's warm workers before Prefect starts the flow, when the run
    has documents to process: a store with no catalog yet (its first run), --force, or
    a weekly run whose source holds a new or changed file (by the stat record, as the
    scan decides; no byte is read) or whose chain changed. The fork server's preload
    (about 2 s of CPU: the step modules, the token encoding, the language profiles)
    then runs beside Prefect's imports and its start of the flow, instead of holding up
    the first document. Only where the batches run in this process (sequential,
    threads: a pool's or Dask's run elsewhere). Not on a guess: starting workers for a
    run with nothing to do made a served no-change run of the demo drive 2-11 s slower
    in four rounds at load 5-7 (the preload competing with it)."""
    runner = definition.model.runner
    wanted = local_workers(runner.kind, workers or runner.workers)
    if not wanted or idle_count() >= wanted:  # started already (by the command, or a run before)
        return
    store = Store(store_root)
    if force or not store.exists("catalog.parquet") or _has_work(definition, source_root, store):
        prewarm(wanted)


def _has_work(definition: FlowDefinition, source_root: str, store: Store) -> bool:
    from thresher.flows.discover import known_files, new_or_changed

    try:
        rows = store.catalog().to_pylist()
    except Exception:  # noqa: BLE001 - the run itself reports a store it cannot read
        return False
    known = known_files(rows)
    if any(r.get("chain_digest") != definition.chain_digest for r in known.values()):
        return True  # another chain: every document goes through it again
    source = definition.model.source
    return new_or_changed(source_root, list(source.include), list(source.exclude), known)


def applies_to(step: ResolvedStep, units: list[Unit]) -> bool:
    if not step.spec.formats:
        return True
    return any(u.format in step.spec.formats for u in units)


def trail(definition: FlowDefinition, before: int) -> tuple[Stage, ...]:
    """The steps before step `before`, as a read of their stored units needs them."""
    return tuple(Stage(s.name, unit_kind(s), bool(s.spec.formats)) for s in definition.steps[:before])


def stored_read_order(definition: FlowDefinition, store: Store, first: int, doc_ids: list[str], run_id: str,
                      batch_size: int) -> list[str] | None:
    """For a segment or corpus step that starts at step `first`: None when its documents'
    inputs are not read back from the store (the first step) or fit one batch anyway;
    else the order in which batches of them read fewest part files and row groups
    (inputs.read_order). Dedup's batches in doc_id order, on a 3,169-document drive,
    each read all 174 parts: 8.7 s of reads."""
    if first == 0 or len(doc_ids) <= batch_size:
        return None
    return read_order(store, trail(definition, first), doc_ids, run_id)


def load_units(store: Store, definition: FlowDefinition, before: int, doc_ids: list[str],
               run_id: str) -> dict[str, Loaded]:
    """Per document, the ok units of the nearest stage before step `before` that holds it
    (inputs.read_units)."""
    return read_units(store, trail(definition, before), doc_ids, run_id)


_failed_document_unit = failed_document_unit


def _worker_failure(step: ResolvedStep, exc: Exception, parents: list[str]) -> Unit:
    """The unit a step's document gets when its worker stopped it, died or failed."""
    kind = unit_kind(step)
    if isinstance(exc, TimeLimitExceeded):
        reason = (f"time limit: {step.name} was stopped after {exc.taken:.2f} s, over its limit of "
                  f"{exc.seconds:g} s (raise the step's time limit if the document is just large)")
        return _failed_document_unit(kind, reason, exc, parents)
    if isinstance(exc, ChildCrashed):
        return _failed_document_unit(kind, f"{step.name} crashed: {exc}", exc, parents)
    assert isinstance(exc, RemoteError)
    unit = _failed_document_unit(kind, f"{step.name} failed: {exc.type_name}: {exc}", None, parents)
    unit.error_type, unit.traceback = exc.type_name, exc.remote_traceback
    return unit


def _call_step(step: ResolvedStep, inputs: Any, ctx: StepContext,
               caller: IsolatedCaller | None = None) -> list[Unit]:
    """Run one step for one document; a raised exception fails the document's units.

    With a caller (the step has a time limit), the call runs in its child process.
    """
    parents = [] if isinstance(inputs, Source) else [u.locator for u in inputs]
    kind = unit_kind(step)
    try:
        if caller is not None:
            limit = step.spec.time_limit(step.params)
            out = caller.call(step.spec.run, (inputs, step.params, ctx), limit)
        else:
            out = step.spec.run(inputs, step.params, ctx)
        if not isinstance(out, list):
            raise TypeError(f"step {step.name} returned {type(out).__name__}, expected a list of units")
        return out
    except (TimeLimitExceeded, ChildCrashed, RemoteError) as exc:
        return [_worker_failure(step, exc, parents)]
    except Exception as exc:  # noqa: BLE001 - a bad document is data, not a crash
        return [_failed_document_unit(kind, f"{step.name} failed: {type(exc).__name__}: {exc}", exc, parents)]


def _rows_for(step: ResolvedStep, ctx: RowContext, units: list[Unit]) -> list[dict[str, Any]]:
    try:
        rows = [to_row(ctx, u) for u in units]
    except Exception as exc:  # noqa: BLE001 - e.g. a payload the table has no column for
        failed = _failed_document_unit(ctx.unit, f"{step.name} output could not be stored: {exc}", exc,
                                       [p for u in units for p in u.parents])
        rows = [to_row(ctx, failed)]
        units[:] = [failed]
    for row in rows[1:]:
        row["document_ms"] = None  # the document's time once, so a sum over rows is real time
    if ctx.unit == "chunks":
        for unit, row in zip(units, rows):
            unit.chunk_id = row["chunk_id"]
    return rows


def _may_pause(doc: DocJob) -> bool:
    """The worker stops after the first step for this process to act (segment.run_segment)
    on a re-run of chosen units. (It also pauses after extraction when it found documents
    inside one; that is known only then, and a worker holding a queued document is then
    replaced, IsolatedCaller._send: a cost for containers only, not for every document.)"""
    return doc.only is not None


class BatchRunner:
    """Runs one segment of the chain for a batch of documents."""

    def __init__(self, definition: FlowDefinition, store: Store, run_id: str):
        self.definition = definition
        self.store = store
        self.run_id = run_id
        self._caller: IsolatedCaller | None = None
        self._attempts: dict[str, dict[str, int]] = {}  # stage -> unit_id -> highest stored attempt
        self._catalog: dict[str, set[str]] | None = None  # doc_id -> chain digests it was processed with
        self._members_seen: set[str] = set()
        self._force = False
        # The batch's next document and, once made ready ahead of its turn, its inputs.
        self._following: tuple | None = None
        self._prepared: tuple | None = None
        self._at_last = False  # the batch's last document is under way
        # A batch waiting for a worker whose first call this batch queued in its own
        # (isolate.claim_waiting): the worker goes to it.
        self._promised: Any = None
        self._sketch: StepCall | None = None  # the sketch call of the batch's documents, if any

    def _caller_for(self, step: ResolvedStep) -> IsolatedCaller | None:
        if step.spec.time_limit is None or step.spec.time_limit(step.params) is None:
            return None
        if not isolation_available():
            return None  # a daemonic worker may not start children: run in-process
        if self._caller is None:
            self._caller = IsolatedCaller()
        return self._caller

    def run(self, job: BatchJob) -> BatchResult:
        t0 = time.perf_counter()
        result = BatchResult(part=job.part, documents=len(job.docs))
        self._force = job.force
        self._sketch = self._sketch_call(job.segment[-1] + 1) if job.segment else None
        rows: dict[str, list[dict[str, Any]]] = defaultdict(list)
        writes: dict[str, list[tuple[str, str]]] = defaultdict(list)
        # Documents that start past the first step read their input from the store.
        by_start: dict[int, list[DocJob]] = defaultdict(list)
        for doc in job.docs:
            by_start[max(doc.start, job.segment[0])].append(doc)
        known = [d.doc_id for d in job.docs if d.known]
        if known:  # one read per stage for the batch, not one per document
            for i in job.segment:
                step = self.definition.steps[i]
                if step.spec.scope == "corpus":
                    continue
                self._attempts[step.name] = self.store.max_attempts(step.name, unit_kind(step), known)
        # Documents that start past the first step read their inputs from the store: a
        # warm worker reads them, once for the batch (inputs.resolve), so that work runs
        # on the workers' cores, not under this process's interpreter lock.
        stored: dict[str, Loaded | StoredInputs] = {}
        for start, docs in by_start.items():
            if start == 0:
                continue
            ids = [d.doc_id for d in docs]
            if isolation_available():
                batch_ids, path = tuple(ids), trail(self.definition, start)
                # An absolute root: a worker's working folder is the fork server's.
                root = self.store.root if "://" in self.store.root else self.store.base
                stored.update({d: StoredInputs(root, self.run_id, path, batch_ids, d) for d in ids})
            else:
                stored.update(load_units(self.store, self.definition, start, ids, self.run_id))
        plan = [(doc, [i for i in job.segment if i >= max(doc.start, job.segment[0])], stored.get(doc.doc_id))
                for doc in job.docs]
        try:
            if plan and isolation_available():
                # The worker is taken with the first document ready: when all are busy,
                # a batch whose worker starts its last document queues this one there.
                self._caller = take_worker(self._ready_call(plan[0]))
            for k, (doc, indices, inputs) in enumerate(plan):
                self._following = plan[k + 1] if k + 1 < len(plan) else None
                self._at_last = k + 1 == len(plan)
                self._run_document(doc, indices, inputs, rows, writes, result)
        finally:
            self._following, self._prepared, self._at_last = None, None, False
            if self._caller is not None:
                # Before this batch's parts are written: the worker goes on meanwhile.
                give_back(self._caller, self._promised)
                self._caller = None
            self._promised = None
        for stage, stage_rows in rows.items():
            unit = unit_kind(self.definition.step(stage))
            self.store.write_stage_part(stage, self.run_id, job.part, rows_to_table(stage, unit, stage_rows),
                                        writes[stage])
        result.sketches = {i: pa.concat_tables(tables) for i, tables in result.sketches.items()}
        result.seconds = time.perf_counter() - t0
        return result

    def _run_document(self, doc: DocJob, indices: list[int], stored: Loaded | StoredInputs | None,
                      rows: dict[str, list[dict[str, Any]]], writes: dict[str, list[tuple[str, str]]],
                      result: BatchResult) -> None:
        if not indices:
            return
        prepared = self._prepared
        if prepared is not None and prepared[0] is doc:
            self._prepared = None
        else:  # not made ready while the previous one ran (or a document found inside one)
            prepared = (doc, self._inputs(doc, indices, stored))
        what, inputs, prev = prepared[1]
        if what == "none":
            return  # nothing upstream is ok: the trail ends at the earlier stage
        if what == "failed":
            self._record(doc, self.definition.steps[0], None, [inputs], now_utc(), 0.0, rows, writes, result)
            return
        if isolation_available():
            self._run_in_worker(doc, indices, inputs, prev, rows, writes, result)
        else:
            self._run_here(doc, indices, inputs, prev, rows, writes, result)

    def _inputs(self, doc: DocJob, indices: list[int],
                stored: Loaded | StoredInputs | None) -> tuple[str, Any, str | None]:
        """What the document's first step reads: ("run", inputs, the stage they came from),
        ("failed", the unit that says why the file cannot be read, None) or ("none", ...)
        when nothing upstream is ok. Records nothing, so it may run ahead of its turn."""
        if indices[0] != 0:
            if isinstance(stored, StoredInputs):
                return "run", stored, None  # the worker reads them and says from which stage
            if stored is None or not stored.units:
                return "none", None, None
            return "run", stored.units, stored.stage
        limit = self.definition.source_limit
        in_hand = doc.data is not None  # the very bytes doc_id was hashed from
        try:
            if limit is not None and doc.size > limit:
                data = b""
            elif in_hand:
                data = doc.data
            elif doc.member_of:
                data = self._member_bytes(doc)
            else:
                data = Path(doc.abs_path).read_bytes()
        except OSError as exc:  # moved, deleted or locked since the scan: this file only
            return "failed", _failed_document_unit("pages", f"cannot read file: {exc.strerror or exc}", exc, []), None
        if data and not in_hand and hashlib.sha256(data).hexdigest() != doc.doc_id:
            # Rewritten between the scan and this read: these bytes are not the
            # document the catalog names; the next run scans the new version.
            return "failed", _failed_document_unit("pages", "file changed while the run read it (its content hash "
                                                   "differs from the scan's); the next run reads the new version",
                                                   None, []), None
        return "run", Source(doc.doc_id, doc.source_path, data, doc.size, doc.mtime, len(doc.member_of)), None

    def _ready_call(self, entry: tuple) -> tuple | None:
        """Make a document ready ahead of its turn (its inputs kept for _run_document) and
        return its call for a worker's queue; None when it has nothing to run in a worker
        or its segment may pause for this process (a re-run of chosen units)."""
        doc, indices, stored = entry
        if not indices or _may_pause(doc):
            return None
        self._prepared = (doc, self._inputs(doc, indices, stored))
        what, inputs, _ = self._prepared[1]
        if what != "run":
            return None
        return run_segment, (self._calls(doc, indices), inputs, doc.doc_id, doc.source_path, False), doc

    def _queue_following(self) -> tuple | None:
        """Once the worker has started a document: the batch's next one, made ready and
        handed to the worker now (IsolatedCaller.stream's `following`), so the worker goes
        straight on to it while this process records and stores the current one. After
        the batch's last document, the first one of a batch waiting for a worker
        (isolate.claim_waiting), which then gets this worker."""
        nxt, self._following = self._following, None
        if not isolation_available():
            return None
        if nxt is not None:
            return self._ready_call(nxt)
        if self._at_last and self._promised is None:
            self._promised = claim_waiting()
            return None if self._promised is None else self._promised.call
        return None

    def _run_here(self, doc: DocJob, indices: list[int], inputs: Any, prev: str | None,
                  rows: dict[str, list[dict[str, Any]]], writes: dict[str, list[tuple[str, str]]],
                  result: BatchResult) -> None:
        """The document's steps in this process (a step with a time limit in a child)."""
        steps = self.definition.steps
        for i in indices:
            step = steps[i]
            if step.spec.scope == "corpus":  # a barrier (segment.run_segment)
                if applies_to(step, inputs):
                    return
                result.through.append(doc.doc_id)
                continue
            if i > 0 and not applies_to(step, inputs):
                continue  # passed by: the next step reads what this one would have read
            ctx = StepContext(doc_id=doc.doc_id, source_path=doc.source_path, encoding=get_encoding)
            if i > 0:
                as_next_inputs(inputs)
            started = now_utc()
            t0 = time.perf_counter()
            caller = self._caller_for(step)
            out = _call_step(step, inputs, ctx, caller)
            ms = (time.perf_counter() - t0) * 1000.0
            if caller is not None and caller.last_seconds is not None:
                ms = caller.last_seconds * 1000.0  # the document's own work, not the child's start
            if caller is None and step.spec.time_limit is not None and step.spec.time_limit(step.params):
                for u in out:  # say so rather than pretend the guard was there
                    u.warnings.append("time limit not enforced: this worker process may not start child "
                                      "processes (a daemonic pool or cluster worker)")
            scope = "document"
            if doc.only is not None and i == indices[0]:
                out, scope = self._keep_chosen(doc, out), "units"
            self._record(doc, step, prev, out, started, ms, rows, writes, result, scope)
            if i == 0:
                self._run_members(doc, out, indices, rows, writes, result)
            if scope == "units":
                inputs = self._merged_with_stored(doc, i, out)
            else:
                inputs = sorted((u for u in out if u.ok), key=_order_key)
            if not inputs:
                return
            prev = step.name

    def _step_call(self, i: int) -> StepCall:
        step = self.definition.steps[i]
        spec = step.spec
        limit = spec.time_limit(step.params) if spec.time_limit is not None else None
        if spec.scope == "corpus":  # a barrier: the worker only checks the formats
            return StepCall(i, step.name, spec.produces, None, step.params, frozenset(spec.formats or ()), None,
                            barrier=True)
        return StepCall(i, step.name, spec.produces, spec.run, step.params, frozenset(spec.formats or ()), limit)

    def _sketch_call(self, index: int) -> StepCall | None:
        """A sketch call for the step at `index` when it is an incremental corpus step:
        its sketch depends on one document's chunks alone, so the worker that made them
        makes it (segment.sketch_here), in parallel, instead of the corpus step, serial."""
        steps = self.definition.steps
        if index >= len(steps) or not isinstance(steps[index].spec, IncrementalCorpusSpec):
            return None
        step = steps[index]
        return StepCall(index, step.name, step.spec.produces, step.spec.sketch, step.params,
                        frozenset(step.spec.formats or ()), None, sketch=True)

    def _calls(self, doc: DocJob, indices: list[int]) -> list[StepCall]:
        """The worker's calls for these steps of the document, and the sketch after the
        segment's last step (not for a re-run of chosen units: those chunks are merged
        with stored ones first)."""
        calls = [self._step_call(i) for i in indices]
        if self._sketch is not None and doc.only is None and indices and indices[-1] + 1 == self._sketch.index:
            calls.append(self._sketch)
        return calls

    def _run_in_worker(self, doc: DocJob, indices: list[int], inputs: Any, prev: str | None,
                       rows: dict[str, list[dict[str, Any]]], writes: dict[str, list[tuple[str, str]]],
                       result: BatchResult) -> None:
        """The document's steps in a warm worker process (flows/segment.py): each step
        still within its own time limit, its rows stored here as soon as it is done."""
        steps = self.definition.steps
        if self._caller is None:
            self._caller = take_worker()
        caller = self._caller
        pos = 0
        while pos < len(indices):
            calls = self._calls(doc, indices[pos:])
            last: tuple[StepDone, list[Unit], str] | None = None
            first_out: list[Unit] | None = None
            # The locators of the units the running step reads: a failure's parents.
            parents = [] if isinstance(inputs, (Source, StoredInputs)) else [u.locator for u in inputs]
            t_mark = time.perf_counter()
            try:
                for done in caller.stream(run_segment, (calls, inputs, doc.doc_id, doc.source_path,
                                                        doc.only is not None and pos == 0),
                                          token=doc if pos == 0 else None,
                                          following=None if _may_pause(doc) else self._queue_following):
                    if isinstance(done, ReadFrom):
                        prev, parents = done.stage, done.locators
                        continue
                    if isinstance(done, PassedOn):
                        result.through.append(doc.doc_id)
                        continue
                    if isinstance(done, Sketched):
                        result.sketches.setdefault(done.index, []).append(done.table)
                        continue
                    step = steps[done.index]
                    out, scope = done.units, "document"
                    if doc.only is not None and done.index == indices[0]:
                        out, scope = self._keep_chosen(doc, out), "units"
                    n, head = len(out), out[0] if out else None
                    self._record(doc, step, prev, out, done.started, done.ms, rows, writes, result, scope)
                    prev, last = step.name, (done, out, scope)
                    if done.index == 0:
                        first_out = out
                    parents = [u.locator for u in sorted((u for u in out if u.ok), key=_order_key)]
                    t_mark = time.perf_counter()
                    if len(out) != n or (out and out[0] is not head):
                        break  # its rows could not be stored: the worker's next steps are moot
            except NotSendable:
                if last is not None:
                    raise  # cannot happen: nothing is sent after the first step
                # A step that cannot be sent to a worker (a function made at run time)
                # runs here instead.
                if isinstance(inputs, StoredInputs):
                    loaded = load_units(self.store, self.definition, indices[0], [doc.doc_id], self.run_id)
                    got = loaded.get(doc.doc_id)
                    if got is None or not got.units:
                        return
                    inputs, prev = got.units, got.stage
                self._run_here(doc, indices[pos:], inputs, prev, rows, writes, result)
                return
            except (TimeLimitExceeded, ChildCrashed, RemoteError) as exc:
                if caller.current == SKETCH_TAG:
                    pass  # lost while sketching: every step's rows are in hand; the corpus step sketches it
                elif isinstance(inputs, StoredInputs) and last is None and caller.current is None:
                    # The worker failed reading the inputs, before any step: read them
                    # here, so a damaged store fails the batch as a read here would.
                    loaded = load_units(self.store, self.definition, indices[0], [doc.doc_id], self.run_id)
                    got = loaded.get(doc.doc_id)
                    if got is None or not got.units:
                        return
                    inputs, prev = got.units, got.stage
                    continue
                else:
                    index = caller.current if isinstance(caller.current, int) else calls[0].index
                    step = steps[index]
                    ms = (exc.taken if isinstance(exc, TimeLimitExceeded) else time.perf_counter() - t_mark) * 1000.0
                    self._record(doc, step, prev, [_worker_failure(step, exc, parents)], now_utc(), ms,
                                 rows, writes, result)
                    return
            if first_out is not None:
                self._run_members(doc, first_out, indices, rows, writes, result)
            if last is None or not last[0].paused:
                return
            done, out, scope = last
            if scope == "units":
                inputs = self._merged_with_stored(doc, done.index, out)
            else:
                inputs = sorted((u for u in out if u.ok), key=_order_key)
            if not inputs:
                return
            pos = indices.index(done.index) + 1

    def _run_members(self, container: DocJob, out: list[Unit], indices: list[int],
                     rows: dict[str, list[dict[str, Any]]], writes: dict[str, list[tuple[str, str]]],
                     result: BatchResult) -> None:
        """Documents that extraction found inside `container` go through the same steps
        now, as documents of their own (doc_id from their bytes), unless the store holds
        them with this chain already or this batch has read them."""
        found = [m for u in out if isinstance(u, Page) for m in u.members]
        for u in out:
            if isinstance(u, Page):
                u.members = []  # bytes are not kept beyond this point
        for m in found:
            doc_id = hashlib.sha256(m.data).hexdigest()
            done = self._processed_with().get(doc_id, set())
            process = (self._force or self.definition.chain_digest not in done) and doc_id not in self._members_seen
            mtime = m.mtime if m.mtime is not None else container.mtime
            info = MemberInfo(f"{container.source_path}/{m.name}", doc_id, len(m.data), mtime,
                              container.doc_id, m.name, process)
            result.members.append(info)
            if not process:
                continue
            self._members_seen.add(doc_id)
            job = DocJob(doc_id, info.source_path, container.abs_path, info.size, mtime, 0, bool(done),
                         member_of=container.member_of + (m.name,), data=m.data)
            if job.known:
                for i in indices:
                    step = self.definition.steps[i]
                    self._attempts.setdefault(step.name, {}).update(
                        self.store.max_attempts(step.name, unit_kind(step), [doc_id]))
            self._run_document(job, indices, None, rows, writes, result)

    def _processed_with(self) -> dict[str, set[str]]:
        """The store's catalog as doc_id -> chain digests, read once per batch and only
        when a container is met."""
        if self._catalog is None:
            cat = self.store.catalog()
            self._catalog = {}
            for d, c in zip(cat.column("doc_id").to_pylist(), cat.column("chain_digest").to_pylist()):
                self._catalog.setdefault(d, set()).add(c or "")
        return self._catalog

    def _member_bytes(self, doc: DocJob) -> bytes:
        """A member's bytes, unpacked again from the drive file that holds it by running
        extraction on each container in turn (in this process: unpacking is guarded by
        the step's own size and count limits)."""
        step = self.definition.steps[0]
        names = doc.member_of
        path = doc.source_path[: len(doc.source_path) - len("/".join(names)) - 1]
        data = Path(doc.abs_path).read_bytes()
        for depth, name in enumerate(names):
            pages = step.spec.run(Source("", path, data, len(data), 0.0, depth), step.params, StepContext())
            inside = {m.name: m.data for p in pages for m in p.members}
            if name not in inside:
                raise FileNotFoundError(f"{name} is no longer inside {path}")
            data, path = inside[name], f"{path}/{name}"
        return data

    def _keep_chosen(self, doc: DocJob, out: list[Unit]) -> list[Unit]:
        """A re-run of chosen units keeps only those; a document-wide failure is kept as it is."""
        chosen = [u for u in out if u.locator in set(doc.only or [])]
        return chosen or [u for u in out if u.locator == DOCUMENT_LOCATOR] or chosen

    def _merged_with_stored(self, doc: DocJob, index: int, new: list[Unit]) -> list[Unit]:
        """The stage's current ok units with the re-run ones in place of their old versions."""
        loaded = load_units(self.store, self.definition, index + 1, [doc.doc_id], self.run_id)
        current = {u.locator: u for u in (loaded[doc.doc_id].units if doc.doc_id in loaded else [])}
        for u in new:
            if u.ok:
                current[u.locator] = u
            else:
                current.pop(u.locator, None)
        return sorted(current.values(), key=_order_key)

    def _record(self, doc: DocJob, step: ResolvedStep, prev: str | None, out: list[Unit],
                started: datetime, ms: float, rows: dict[str, list[dict[str, Any]]],
                writes: dict[str, list[tuple[str, str]]], result: BatchResult, scope: str = "document") -> None:
        """Turn one step's units for one document into rows, and count them."""
        kind = unit_kind(step)
        attempts = self._attempts.get(step.name, {}) if doc.known else {}
        result.step_seconds += ms / 1000.0
        rctx = RowContext(self.run_id, doc.doc_id, doc.source_path, step.name, step.spec.version,
                          step.digest, kind, prev, started, round(ms, 3), attempts)
        rows[step.name].extend(_rows_for(step, rctx, out))
        writes[step.name].append((doc.doc_id, scope))
        counts = result.counts.setdefault(step.name, {})
        for u in out:
            counts[u.status] = counts.get(u.status, 0) + 1
            if u.status == "failed":
                result.failures.append((doc.source_path, step.name, u.reason))
