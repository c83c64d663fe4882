"""Store housekeeping: compaction and retention. Both take the store's lock.

Compaction rewrites every row of a stage (all attempts of all committed runs) into a
new generation of few large part files, sorted by (doc_id, unit_id) so a one-document
read prunes whole row groups, with one ledger saying which part holds each (run,
document). The stage's record `stages/<stage>/_compacted.json` is switched to the new
generation in one atomic write: before it, readers see the old files; after it, the
new ones. The files it replaced are removed afterwards (and by the next writer's
recovery, if the compaction was killed before it finished).

Retention is a compaction that leaves out the attempts nobody needs: rows of runs
older than the kept window that are not in the current view. Then it removes old
change sets beyond their own limit, and the manifests and folders of old runs that
no longer hold any row (the manifest first, which makes the rest an uncommitted
leftover that any writer may sweep).
"""

from __future__ import annotations

import secrets
from contextlib import ExitStack
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from thresher.flows import schema
from thresher.flows.faults import fault
from thresher.flows.probes import probes_rel
from thresher.flows.store import COMPACTED, Store
from thresher.flows.summary import stages_of

# Rows per compacted part file, and per row group inside it. A row group is what a
# one-document read skips by its doc_id statistics (common practice: row groups of a
# few hundred rows for point lookups: pages of text are large).
ROWS_PER_PART = 200_000
ROW_GROUP_ROWS = 512
# Documents read at a time while rewriting, so memory holds one group's rows.
GROUP_DOCS = 500


def _stages(store: Store) -> list[tuple[str, str]]:
    latest = store.latest_run()
    return stages_of(latest.manifest) if latest else []


def _documents(store: Store, stage: str, seq: dict[str, int]) -> list[str]:
    docs: set[str] = set()
    compacted = store._compacted_ledger(stage)
    if compacted is not None:
        docs |= set(compacted.files) | {d for d, _ in compacted.full}
    covered = set((store.compaction(stage) or {}).get("runs", []))
    for run_id in seq:
        if run_id not in covered:
            docs |= set(store._ledger(stage, run_id).files) | set(store._ledger(stage, run_id).full)
    return sorted(docs)


def _full_writes(store: Store, stage: str, seq: dict[str, int]) -> list[tuple[str, str]]:
    """(doc_id, run_id) of every whole-document rewrite of these runs at the stage."""
    out = []
    compacted = store._compacted_ledger(stage)
    covered = set((store.compaction(stage) or {}).get("runs", []))
    if compacted is not None:
        out += [(d, r) for d, r in compacted.full if r in seq]
    for run_id in seq:
        if run_id not in covered:
            out += [(d, run_id) for d in store._ledger(stage, run_id).full]
    return out


class _PartWriter:
    """Rows appended in order, rolled over into a new part file every ROWS_PER_PART."""

    def __init__(self, store: Store, folder: str, sch: pa.Schema):
        self.store, self.folder, self.sch = store, folder, sch
        self.stack = ExitStack()
        self.writer: pq.ParquetWriter | None = None
        self.rows = 0
        self.names: list[str] = []

    def write(self, table: pa.Table) -> str:
        if self.writer is None or self.rows >= ROWS_PER_PART:
            self.stack.close()
            self.stack = ExitStack()
            name = f"part-{len(self.names):05d}.parquet"
            self.names.append(name)
            self.writer = self.stack.enter_context(self.store.parquet_writer(f"{self.folder}/{name}", self.sch))
            self.rows = 0
        self.writer.write_table(table, row_group_size=ROW_GROUP_ROWS)
        self.rows += table.num_rows
        return self.names[-1]

    def close(self) -> None:
        self.stack.close()


@dataclass
class StageRewrite:
    stage: str
    rows_before: int = 0
    rows_after: int = 0
    parts_before: int = 0
    parts_after: int = 0


def rewrite_stage(store: Store, stage: str, unit: str,
                  keep: Callable[[pa.Table, pa.Table], pa.Table] | None = None,
                  point: str = "compact") -> StageRewrite:
    """Rewrite a stage's rows into one new compacted generation (see the module doc).

    `keep(rows, current)` may leave rows out (retention); compaction keeps them all.
    Call only while holding the lock.
    """
    seq = {r.run_id: r.sequence for r in store.runs(refresh=True)}
    out = StageRewrite(stage, parts_before=store.part_files(stage))
    gen = f"{datetime.now(timezone.utc):%Y%m%dT%H%M%S}Z-{secrets.token_hex(3)}"
    folder = f"stages/{stage}/{COMPACTED}/{gen}"
    sch = schema.stage_schema(stage, unit)
    ledger: set[tuple[str, str, str, str]] = set()
    writer = _PartWriter(store, folder, sch)
    docs = _documents(store, stage, seq)
    try:
        for start in range(0, len(docs), GROUP_DOCS):
            group = docs[start:start + GROUP_DOCS]
            rows = store.stage_rows(stage, unit, group)
            out.rows_before += rows.num_rows
            if keep is not None and rows.num_rows:
                rows = keep(rows, store.current(stage, unit, group, columns=["unit_id", "run_id", "attempt"]))
            if rows.num_rows == 0:
                continue
            rows = rows.sort_by([("doc_id", "ascending"), ("unit_id", "ascending"),
                                 ("run_id", "ascending"), ("attempt", "ascending")])
            part = writer.write(rows)
            pairs = set(zip(rows.column("run_id").to_pylist(), rows.column("doc_id").to_pylist()))
            ledger |= {(r, d, "units", part) for r, d in pairs}
            out.rows_after += rows.num_rows
    finally:
        writer.close()
    holding = {r for r, _, _, _ in ledger}
    # A whole-document rewrite stays on record while its run holds rows, or is the
    # latest rewrite of that document (it retires older units even with no rows).
    latest_full: dict[str, tuple[int, str]] = {}
    for d, r in _full_writes(store, stage, seq):
        if seq[r] > latest_full.get(d, (0, ""))[0]:
            latest_full[d] = (seq[r], r)
    for d, r in _full_writes(store, stage, seq):
        if r in holding or latest_full[d][1] == r:
            ledger.add((r, d, "document", ""))
    fault(f"{point}-parts-written")
    rows = sorted(ledger, key=lambda e: (e[1], e[0], e[2], e[3]))  # by doc_id: a lookup skips row groups
    table = pa.table({c: [row[i] for row in rows] for i, c in enumerate(("run_id", "doc_id", "scope", "part"))},
                     schema=schema.COMPACTED_LEDGER)
    store.write_table(f"{folder}/ledger.parquet", table)
    fault(f"{point}-ledger-written")
    files = {rel: store.file_record(rel) for rel in store.files_under(folder)}
    store.write_json(store.compaction_rel(stage), {
        "generation": gen, "runs": sorted(seq), "files": files,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "rows": out.rows_after})
    store.runs(refresh=True)
    fault(f"{point}-switched")
    _finish(store, stage, point)
    out.parts_after = len(writer.names)
    return out


def _finish(store: Store, stage: str, point: str) -> None:
    first = True

    def each(_rel: str) -> None:
        nonlocal first
        if not first:
            fault(f"{point}-mid-remove")
        first = False

    store.finish_compaction(stage, each)


# ----------------------------------------------------------------------------- compaction

def compact(store: Store, threshold: int = 0, stages: list[str] | None = None) -> list[StageRewrite]:
    """Compact every stage (or those named) spread over more than `threshold` part files."""
    done = []
    for stage, unit in _stages(store):
        if stages is not None and stage not in stages:
            continue
        if store.part_files(stage) > max(threshold, 1):
            done.append(rewrite_stage(store, stage, unit))
    return done


# ----------------------------------------------------------------------------- retention

@dataclass
class RetentionPlan:
    kept_runs: list[str]
    old_runs: list[str]
    rows_dropped: dict[str, int] = field(default_factory=dict)  # stage -> rows that would go
    changes: list[str] = field(default_factory=list)  # change-set files to remove
    runs_removed: list[str] = field(default_factory=list)  # runs whose manifest and folders go
    bytes_freed: int = 0
    done: bool = False


def _kept(store: Store, keep_runs: int | None, since: datetime | None) -> tuple[list[str], list[str]]:
    runs = store.runs(refresh=True)
    kept = set()
    if keep_runs is not None:
        kept |= {r.run_id for r in runs[-keep_runs:]} if keep_runs > 0 else set()
    if since is not None:
        for r in runs:
            started = datetime.fromisoformat(r.manifest.get("started_at") or "1970-01-01T00:00:00+00:00")
            if started.tzinfo is None:
                started = started.replace(tzinfo=timezone.utc)
            if started >= since:
                kept.add(r.run_id)
    if runs:
        kept.add(runs[-1].run_id)
    return [r.run_id for r in runs if r.run_id in kept], [r.run_id for r in runs if r.run_id not in kept]


def _droppable(rows: pa.Table, current: pa.Table, old: set[str], needed: set[str]) -> pa.Array:
    """Mask of rows to drop: from an old run, and either not the current attempt of
    their unit or of a document no catalog row and no hand-off chunk names any more
    (an edited file's earlier version; a deleted file keeps its catalog row)."""
    cur = set(zip(current.column("unit_id").to_pylist(), current.column("run_id").to_pylist(),
                  current.column("attempt").to_pylist()))
    return pa.array([r in old and ((u, r, a) not in cur or d not in needed) for u, r, a, d in zip(
        rows.column("unit_id").to_pylist(), rows.column("run_id").to_pylist(), rows.column("attempt").to_pylist(),
        rows.column("doc_id").to_pylist())], pa.bool_())


def _needed_documents(store: Store) -> set[str]:
    needed = set(store.catalog().column("doc_id").to_pylist())
    handoff = store.handoff()
    if handoff is not None:
        needed |= set(handoff.column("doc_id").to_pylist())
    return needed


def _stage_bytes(store: Store, stage: str) -> int:
    total = 0
    for info in store._list(f"stages/{stage}", recursive=True):
        if info.base_name.endswith(".parquet"):
            total += info.size or 0
    return total


def _run_bytes(store: Store, run_id: str) -> int:
    return sum(i.size or 0 for i in store._list(f"runs/{run_id}", recursive=True) if i.size)


def retention_plan(store: Store, keep_runs: int | None, since: datetime | None,
                   keep_changes: int | None) -> RetentionPlan:
    """What retention would remove, and about how many bytes that frees."""
    kept, old = _kept(store, keep_runs, since)
    plan = RetentionPlan(kept, old)
    oldset = set(old)
    needed = _needed_documents(store)
    holding: set[str] = set()
    for stage, unit in _stages(store):
        cols = ["unit_id", "run_id", "attempt", "doc_id"]
        rows = store.stage_rows(stage, unit, columns=cols)
        if rows.num_rows == 0:
            continue
        drop = _droppable(rows, store.current(stage, unit, columns=cols), oldset, needed)
        n = pc.sum(drop).as_py() or 0
        plan.rows_dropped[stage] = n
        plan.bytes_freed += int(_stage_bytes(store, stage) * n / rows.num_rows)
        holding |= set(rows.filter(pc.invert(drop)).column("run_id").to_pylist())
    runs = store.runs()
    by_seq = [r.run_id for r in runs]
    limit = len(kept) if keep_changes is None else keep_changes
    keep_change_ids = set(by_seq[-limit:]) if limit > 0 else set()
    for info in store._list("handoff/changes"):
        run_id = info.base_name[:-len(".parquet")]
        if info.base_name.endswith(".parquet") and run_id not in keep_change_ids:
            plan.changes.append(f"handoff/changes/{info.base_name}")
            plan.bytes_freed += info.size or 0
    # A run's manifest stays while a row, the catalog's ranks (first_run) or a published
    # file needs it. A run's own probe results are its history, not a shared file: they
    # go with the run, except the newest, which the next run compares against.
    needed = set(holding)
    needed |= {r["first_run"] for r in store.catalog().to_pylist()}
    newest_probes = next((r.run_id for r in reversed(runs) if probes_rel(r.run_id) in
                          r.manifest.get("publish", {}).values()), None)
    needed.add(newest_probes)
    needed |= {r.run_id for final, r in store.publishers().items()
               if not final.startswith(("handoff/changes/", "probes/"))}
    plan.runs_removed = [r for r in old if r not in needed]
    plan.bytes_freed += sum(_run_bytes(store, r) for r in plan.runs_removed)
    for run_id in plan.runs_removed:
        plan.bytes_freed += store.fs.get_file_info(store.path(probes_rel(run_id))).size or 0
    return plan


def retain(store: Store, keep_runs: int | None, since: datetime | None = None,
           keep_changes: int | None = None, dry_run: bool = False) -> RetentionPlan:
    """Apply retention (see the module doc). Call only while holding the lock."""
    plan = retention_plan(store, keep_runs, since, keep_changes)
    if dry_run:
        return plan
    before = _store_bytes(store)
    oldset = set(plan.old_runs)
    needed = _needed_documents(store)
    first = True
    for stage, unit in _stages(store):
        if not plan.rows_dropped.get(stage):
            continue
        rewrite_stage(store, stage, unit, keep=lambda rows, cur: rows.filter(pc.invert(_droppable(rows, cur, oldset, needed))),
                      point="compact")
        if first:
            fault("retain-stage-rewritten")
            first = False
    if plan.changes:
        noted = store.retired_changes() | {c.rsplit("/", 1)[1][:-len(".parquet")] for c in plan.changes}
        store.write_json("retention.json", {"changes_retired": sorted(noted)})
        fault("retain-changes-noted")
        for rel in plan.changes:
            store.delete_file(rel)
        fault("retain-changes-removed")
    for run_id in plan.runs_removed:
        store.delete_file(f"runs/{run_id}/manifest.json")
        fault("retain-manifest-removed")
        store.sweep_uncommitted()
        fault("retain-run-swept")
        store.delete_file(f"handoff/changes/{run_id}.parquet")
        store.delete_file(probes_rel(run_id))
    store.runs(refresh=True)
    plan.bytes_freed = max(0, before - _store_bytes(store))
    plan.done = True
    return plan


def _store_bytes(store: Store) -> int:
    return sum(i.size or 0 for i in store._list("", recursive=True) if i.type.name == "File")
