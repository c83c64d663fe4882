"""Delivering committed runs' change sets to the indexes a team reads from.

A delivery target is anything with two methods (see `Target`): which runs it holds,
and "apply these runs" in one transaction that also records them. This module decides
what a target needs; the targets only write.

What a target needs, given the runs it has recorded:
- nothing, when it holds the latest committed run;
- the change sets of every committed run after the last one it holds, in run order,
  applied in one transaction — when each of those change sets is still in the store;
- a full load from the current hand-off, in one transaction, when it holds no run yet
  or a change set it would need is gone (removed by retention) or the run it holds is
  no longer in the store.

Upserted rows come from the current hand-off: a run's change set names the chunk ids,
and the newest version of each is what the target must end up with. A chunk a run
upserted that a later run deleted is not in the hand-off; the later run's delete is in
the same transaction, so skipping the upsert gives the same end state. After a delivery
the target holds exactly the hand-off of the latest committed run.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from typing import Any, Iterator, Protocol

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from thresher.flows.config import FlowDefinition, TargetEntry
from thresher.flows.store import Store

HANDOFF_REL = "handoff/chunks.parquet"


def changes_rel(run_id: str) -> str:
    return f"handoff/changes/{run_id}.parquet"


@dataclass
class RunChanges:
    """One run's change set, resolved against the current hand-off."""

    run_id: str
    sequence: int
    upserts: pa.Table  # hand-off rows (current version) of the chunks the run upserted
    deletes: list[str]  # chunk ids the run deleted


@dataclass
class Delivery:
    """What one target must apply, in one transaction.

    `full` is set for a full load (every current hand-off row; the target drops what it
    held first); otherwise `runs` holds the pending runs' changes in run order. `record`
    is every (run_id, sequence) the target must record as applied afterwards.
    """

    columns: pa.Schema
    full: pa.Table | None = None
    runs: list[RunChanges] = field(default_factory=list)
    record: list[tuple[str, int]] = field(default_factory=list)

    @property
    def latest(self) -> str | None:
        return self.record[-1][0] if self.record else None


class Target(Protocol):
    """The interface a delivery target implements (built-ins and your own)."""

    def applied_runs(self) -> list[str]:
        """Run ids this target has recorded as applied, oldest first (empty when new)."""

    def apply(self, delivery: Delivery) -> None:
        """Apply the delivery in ONE transaction that also records `delivery.record`.
        On any failure nothing of it may remain."""

    def close(self) -> None:
        """Release connections."""


@dataclass
class DeliveryResult:
    target: str
    mode: str  # "up to date" | "changes" | "full load"
    runs: list[str]
    upserts: int
    deletes: int
    rows: int  # rows the target holds afterwards, as it reports them (None when unknown)


class DeliveryError(RuntimeError):
    """A target that cannot be opened or written; the message names the target."""


def open_target(entry: TargetEntry, store: Store) -> Target:
    """The target a definition entry names: built-in kind or `package.module:factory`
    (called with the entry and the store)."""
    if entry.kind == "sqlite":
        from thresher.flows.targets.sqlite import SqliteTarget

        return SqliteTarget(entry, store)
    if entry.kind == "postgres":
        from thresher.flows.targets.postgres import PostgresTarget

        return PostgresTarget(entry, store)
    module_name, _, attr = entry.kind.partition(":")
    try:
        factory = getattr(importlib.import_module(module_name), attr)
    except (ImportError, AttributeError) as exc:
        raise DeliveryError(f"target {entry.name}: cannot load {entry.kind} ({exc})") from None
    return factory(entry, store)


def _handoff(store: Store, chunk_ids: list[str] | None = None) -> pa.Table:
    """The current hand-off, or only the rows of these chunk ids."""
    rel = store.published(HANDOFF_REL)
    if rel is None:
        raise DeliveryError("the store has no hand-off yet: run `thresher run` first")
    if chunk_ids is None:
        return store.read_table(rel)
    if not chunk_ids:  # a week with nothing to upsert: only the columns
        with store.fs.open_input_file(store.path(rel)) as f:
            return pq.ParquetFile(f).schema_arrow.empty_table()
    import pyarrow.dataset as ds

    data = ds.dataset(store.path(rel), filesystem=store.fs, format="parquet")
    return data.to_table(filter=ds.field("chunk_id").isin(pa.array(chunk_ids, pa.string())))


def plan_delivery(store: Store, applied: list[str]) -> Delivery | None:
    """What a target holding `applied` runs needs; None when it is up to date."""
    runs = store.runs()
    if not runs:
        raise DeliveryError("the store has no committed run yet: run `thresher run` first")
    latest = runs[-1]
    if applied and applied[-1] == latest.run_id:
        return None
    seq_of = {r.run_id: r.sequence for r in runs}
    last = applied[-1] if applied else None
    pending = [r for r in runs if last in seq_of and r.sequence > seq_of[last]]
    rels = [store.published(changes_rel(r.run_id)) for r in pending]
    if last not in seq_of or any(rel is None for rel in rels):
        # New; or the run it holds last, or a change set it needs, has been removed
        # from the store (retention): start again from the hand-off.
        handoff = _handoff(store)
        return Delivery(columns=handoff.schema, full=handoff, record=[(latest.run_id, latest.sequence)])
    changes = []
    wanted: set[str] = set()
    for rel in rels:
        t = store.read_table(rel, columns=["chunk_id", "action"])
        ups = t.filter(pc.equal(t.column("action"), "upsert")).column("chunk_id").to_pylist()
        dels = t.filter(pc.equal(t.column("action"), "delete")).column("chunk_id").to_pylist()
        changes.append((ups, dels))
        wanted.update(ups)
    # Only the rows the change sets upsert are read from the hand-off (a filter on
    # chunk_id), so a small week costs in proportion to what changed.
    rows = _handoff(store, sorted(wanted))
    index = {cid: i for i, cid in enumerate(rows.column("chunk_id").to_pylist())}
    out = Delivery(columns=rows.schema)
    for r, (ups, dels) in zip(pending, changes):
        take = sorted(index[c] for c in ups if c in index)
        out.runs.append(RunChanges(r.run_id, r.sequence, rows.take(pa.array(take, pa.int64())), dels))
        out.record.append((r.run_id, r.sequence))
    return out


def deliver(definition: FlowDefinition, store: Store, names: list[str] | None = None) -> list[DeliveryResult]:
    """Bring each named target (all by default) to the latest committed run."""
    entries = _entries(definition, names)
    results = []
    for entry in entries:
        target = open_target(entry, store)
        try:
            delivery = plan_delivery(store, target.applied_runs())
            if delivery is None:
                results.append(DeliveryResult(entry.name, "up to date", [], 0, 0, _rows(target)))
                continue
            target.apply(delivery)
            if delivery.full is not None:
                results.append(DeliveryResult(entry.name, "full load", [delivery.latest or ""],
                                              delivery.full.num_rows, 0, _rows(target)))
            else:
                results.append(DeliveryResult(entry.name, "changes", [r.run_id for r in delivery.runs],
                                              sum(r.upserts.num_rows for r in delivery.runs),
                                              sum(len(r.deletes) for r in delivery.runs), _rows(target)))
        finally:
            target.close()
    return results


def _rows(target: Target) -> int | None:
    count = getattr(target, "row_count", None)
    return count() if callable(count) else None


def _entries(definition: FlowDefinition, names: list[str] | None) -> list[TargetEntry]:
    entries = list(definition.model.deliver.targets)
    if names:
        known = {e.name for e in entries}
        unknown = [n for n in names if n not in known]
        if unknown:
            allowed = ", ".join(sorted(known)) or "none: the definition has no deliver.targets"
            raise DeliveryError(f"no target named {', '.join(unknown)} (targets: {allowed})")
        entries = [e for e in entries if e.name in names]
    return entries


@dataclass
class TargetState:
    name: str
    kind: str
    applied: str | None  # the latest run it holds
    behind: int | None  # committed runs it lacks; None when it cannot be read
    problem: str = ""


def target_states(definition: FlowDefinition, store: Store) -> list[TargetState]:
    """How far behind the latest committed run each target is (for status and the report)."""
    return entry_states(list(definition.model.deliver.targets), store)


def snapshot_targets(manifest: dict) -> list[TargetEntry]:
    """The targets named by the definition a run used (its manifest's snapshot)."""
    section = (manifest.get("definition") or {}).get("deliver") or {}
    return [TargetEntry.model_validate(t) for t in section.get("targets") or []]


def entry_states(entries: list[TargetEntry], store: Store) -> list[TargetState]:
    runs = store.runs()
    seq_of = {r.run_id: r.sequence for r in runs}
    out = []
    for entry in entries:
        try:
            target = open_target(entry, store)
            try:
                applied = target.applied_runs()
            finally:
                target.close()
        except Exception as exc:  # noqa: BLE001 - status reports, it does not fail
            out.append(TargetState(entry.name, entry.kind, None, None, f"{type(exc).__name__}: {exc}"))
            continue
        last = applied[-1] if applied else None
        behind = sum(1 for r in runs if r.sequence > seq_of[last]) if last in seq_of else len(runs)
        out.append(TargetState(entry.name, entry.kind, last, behind))
    return out


def row_values(table: pa.Table) -> Iterator[dict[str, Any]]:
    """Rows as Python values, map columns as dicts (what both built-in targets write)."""
    maps = {f.name for f in table.schema if pa.types.is_map(f.type)}
    for row in table.to_pylist():
        for m in maps:
            if row[m] is not None:
                row[m] = dict(row[m])
        yield row
