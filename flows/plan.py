"""Deciding what a run must do: the new catalog, and where each document starts.

A document (one doc_id) is skipped when the store already processed it with the
same chain of step versions and parameters; otherwise it starts at the first
stage whose stored rows were made with a different step version or parameters.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Sequence
from datetime import datetime, timezone

import pyarrow as pa

from thresher.flows import schema
from thresher.flows.access import catalog_columns, document_access, inherit_container_access
from thresher.flows.config import FlowDefinition, SourceSection
from thresher.flows.discover import ScanProblem, SourceFile, known_files, matches, scan
from thresher.flows.execute import DocJob, MemberInfo
from thresher.flows.store import Store


# Fewer removals than this are never refused, whatever their share (a small drive
# tidied). Common practice, no source.
REMOVAL_FLOOR = 10


class TooManyRemovals(RuntimeError):
    """A run would remove more of the drive's documents than the definition allows."""


@dataclass
class Plan:
    catalog: pa.Table
    jobs: list[DocJob]  # documents to process, largest first
    skipped: list[str]  # doc_ids reused as stored
    deleted: list[str]  # doc_ids no longer at any path
    live: dict[str, tuple[int, str, int]]  # doc_id -> (rank, live path, its mtime in ns)
    copies: dict[str, list[str]] = field(default_factory=dict)  # doc_id -> other paths with the same bytes
    # For ranking documents found inside containers during the run (add_members).
    seq_of: dict[str, int] = field(default_factory=dict)
    sequence: int = 0
    run_id: str = ""
    chain: str = ""
    # Catalog rows (by path) of members of containers read again in this run: removed
    # unless the run finds them again, or finds their container unchanged.
    awaited: dict[str, dict] = field(default_factory=dict)
    # doc_id -> (readers, label, rule key); readers [] = nobody (left out of the hand-off)
    access: dict[str, tuple[list[str], str | None, str]] = field(default_factory=dict)
    access_section: Any = None  # the definition's access section, for members found later
    source_section: Any = None  # the definition's source section (live path rule), likewise
    # doc_id -> live path of the documents live after the latest run (its catalog), so
    # the hand-off knows which documents it held or withheld; None: unknown.
    previous_live: dict[str, str | None] | None = None
    # doc_ids kept as stored because the scan could not read their files this run (they
    # are among `skipped`; see held_paths).
    held: list[str] = field(default_factory=list)

    @property
    def unchanged(self) -> int:
        """Documents reused as stored because they are current (not held)."""
        return len(self.skipped) - len(self.held)

    @property
    def removed_paths(self) -> dict[str, str | None]:
        """doc_id -> last live path of each document this run removes."""
        previous = self.previous_live or {}
        return {d: previous.get(d) for d in self.deleted}


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


def _modified_ns(row: dict) -> int:
    """When the file at this catalog row was last modified, in ns (0 when unknown)."""
    if row.get("mtime_ns") is not None:
        return int(row["mtime_ns"])
    m = row.get("mtime")
    return int(m.timestamp() * 1_000_000_000) if m is not None else 0


def live_documents(catalog_rows: list[dict], seq_of: dict[str, int], sequence: int,
                   source: SourceSection | None = None
                   ) -> tuple[dict[str, str], dict[str, tuple[int, str, int]], dict[str, list[str]]]:
    """From catalog rows: the live path of each document, ranks, and copies.

    Where the same bytes sit at several paths, the live path (the one the hand-off
    names and readers are sent to) is chosen by `source_path_key`. A document's rank
    orders it for deterministic choices: first the run that first saw it, then its
    live path. live maps doc_id -> (rank, live path, its modification time in ns).
    """
    source = source or SourceSection()
    present: dict[str, list[dict]] = {}
    for r in catalog_rows:
        if r["present"]:
            present.setdefault(r["doc_id"], []).append(r)
    first_seq: dict[str, int] = {}
    for r in catalog_rows:
        s = seq_of.get(r["first_run"], sequence)
        first_seq[r["doc_id"]] = min(first_seq.get(r["doc_id"], s), s)
    # Most documents sit at one path: no key to work out (it matches globs per row).
    chosen = {d: rows[0] if len(rows) == 1 else min(rows, key=lambda r: source_path_key(r, source))
              for d, rows in present.items()}
    canonical = {d: r["source_path"] for d, r in chosen.items()}
    order = sorted(canonical, key=lambda d: (first_seq[d], canonical[d]))
    live = {d: (rank, canonical[d], _modified_ns(chosen[d])) for rank, d in enumerate(order)}
    copies = {d: sorted(r["source_path"] for r in rows if r["source_path"] != canonical[d])
              for d, rows in present.items() if len(rows) > 1}
    return canonical, live, copies


def source_path_key(row: dict, source: SourceSection) -> tuple:
    """Lower sorts first among the paths of one document: a file of the drive before a
    copy inside an archive or e-mail, a path outside the archive folders before one in
    them, then (copies_by: newest) the most recently modified, then path order."""
    path = row["source_path"]
    archived = matches(path.lower(), [p.lower() for p in source.archive_folders])
    newest = -_modified_ns(row) if source.copies_by == "newest" else 0
    return (bool(row.get("container_doc_id")), archived, newest, path)


def held_paths(unread: Sequence[str]) -> Callable[[str], bool]:
    """Whether a source path is one the scan could not read this run: a file it could
    not read, or a file under a folder it could not list (such a problem's path ends
    with "/"; "./" is the source folder itself)."""
    files = {p for p in unread if not p.endswith("/")}
    folders = tuple("" if p == "./" else p for p in unread if p.endswith("/"))
    return lambda path: path in files or path.startswith(folders)


def scan_and_plan(definition: FlowDefinition, store: Store, source_root: str, run_id: str, sequence: int,
                  force: bool = False, verify: bool = False
                  ) -> tuple[list[SourceFile], list[ScanProblem], Plan]:
    """A run's scan of the source folder and its plan (for a run, and for a dry run):
    the catalog read once, for the scan's stat records and then the plan; the scan's
    problems hold what was last read there, but where reading was refused."""
    source = definition.model.source
    catalog = store.catalog().to_pylist()
    files, problems = scan(source_root, list(source.include), list(source.exclude), known=known_files(catalog),
                           verify=verify or source.verify, read_limit=definition.source_limit)
    plan = make_plan(definition, store, files, run_id, sequence, force=force, catalog=catalog,
                     unread=[p.source_path for p in problems if not p.denied])
    return files, problems, plan


def make_plan(definition: FlowDefinition, store: Store, files: list[SourceFile], run_id: str,
              sequence: int, force: bool = False, catalog: list[dict] | None = None,
              unread: Sequence[str] = ()) -> Plan:
    """`catalog`: the store's catalog rows when the caller has read them already.

    `unread`: the paths of the scan's problems, but those where reading was refused. A
    document the catalog has at such a path only is held: kept as stored, neither
    removed nor processed, until a run can read it again. A drive that cannot be read
    for a week (a share's folder off line, a link to a mount that is down) must not
    lose its chunks; a permission taken away is meant, and removes them.
    """
    old = store.catalog().to_pylist() if catalog is None else catalog
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
            **catalog_columns(definition.model.access, f.source_path, f.facts),
        })
        seen_paths.add(f.source_path)
    drive_docs = {f.doc_id for f in files}
    members = [r for r in old if r.get("container_doc_id") and r["source_path"] not in seen_paths]
    unreadable = held_paths(unread)
    held: set[str] = set()
    for r in old:
        if r["source_path"] not in seen_paths and not r.get("container_doc_id"):
            # A document also read at another path is not held: it lives on there.
            keep = r["present"] and r["doc_id"] not in drive_docs and unreadable(r["source_path"])
            if keep:
                held.add(r["doc_id"])
            rows.append(dict(r) if keep else dict(r, present=False))

    # Which drive documents start at extraction: those re-read their members in the run.
    to_do_drive = {d for d in drive_docs if force or chain not in processed_with.get(d, set())}
    known_drive = [d for d in to_do_drive if d in processed_with]
    starts = start_stages(definition, store, known_drive) if known_drive and not force else {}
    reread = {d for d in to_do_drive if starts.get(d, 0) == 0}
    # Members of containers that are not read again stay as they are (transitively).
    live_ids = drive_docs | held
    carried: list[dict] = []
    pending = members
    while True:
        keep = [r for r in pending if r["present"] and r["container_doc_id"] in live_ids
                and r["container_doc_id"] not in reread]
        if not keep:
            break
        carried += keep
        live_ids |= {r["doc_id"] for r in keep}
        pending = [r for r in pending if r not in keep]
    for r in carried:  # in layers, containers before their members
        if r["container_doc_id"] in held and r["doc_id"] not in drive_docs:
            held.add(r["doc_id"])
        rows.append(dict(r, last_run=run_id))
    for r in pending:
        rows.append(dict(r, present=False))
    # Members of containers read again or gone: removed unless the run finds them again.
    awaited = {r["source_path"]: r for r in pending if r["present"]}

    canonical, live, copies = live_documents(rows, seq_of, sequence, definition.model.source)

    file_at = {f.source_path: f for f in files}
    row_at = {r["source_path"]: r for r in rows}
    # A held document is not processed even when forced or out of date: its file cannot be read.
    to_do = [d for d in canonical if d not in held and (force or chain not in processed_with.get(d, set()))]
    skipped = sorted(set(canonical) - set(to_do))
    more = [d for d in to_do if d in processed_with and d not in to_do_drive]
    if more and not force:
        starts.update(start_stages(definition, store, more))
    jobs = []
    for d in to_do:
        path = canonical[d]
        if path in file_at:
            f = file_at[path]
            abs_path, size, mtime, inside, data = f.abs_path, f.size, f.mtime, (), f.data
        else:
            outer, inside = member_chain(row_at, canonical, path)
            r = row_at[path]
            abs_path = file_at[outer].abs_path
            size, mtime = int(r.get("size") or 0), r["mtime"].timestamp() if r.get("mtime") else 0.0
            data = None
        jobs.append(DocJob(doc_id=d, source_path=path, abs_path=abs_path, size=size, mtime=mtime,
                           start=starts.get(d, 0), known=d in processed_with, member_of=inside,
                           data=data if starts.get(d, 0) == 0 else None))
    jobs.sort(key=lambda j: (-j.size, j.source_path))

    for r in rows:
        if r["present"]:
            r["canonical_path"] = canonical[r["doc_id"]]
            if r["doc_id"] not in held:  # a held one keeps its chain, for a later run to redo
                # After this run every other present document is processed with this chain.
                r["chain_digest"] = chain
    rows.sort(key=lambda r: r["source_path"])
    inherit_container_access(rows)
    deleted = sorted({r["doc_id"] for r in old if r["present"]} - set(canonical)
                     - {r["doc_id"] for r in awaited.values()})
    catalog = pa.Table.from_pylist(rows, schema=schema.CATALOG)
    return Plan(catalog=catalog, jobs=jobs, skipped=skipped, deleted=deleted, live=live, copies=copies,
                seq_of=seq_of, sequence=sequence, run_id=run_id, chain=chain, awaited=awaited,
                access=document_access(rows, definition.model.access), access_section=definition.model.access,
                source_section=definition.model.source,
                previous_live={r["doc_id"]: r.get("canonical_path") for r in old if r["present"]},
                held=sorted(held))


def check_removals(plan: Plan, limit: float, source_root: str) -> None:
    """Refuse a run that would remove more than `limit` of the documents the last run
    held (an unmounted share, a wrong --source, an include glob gone wrong), before it
    writes anything."""
    before = len(plan.previous_live or {})
    n = len(plan.deleted)
    if n >= REMOVAL_FLOOR and n > limit * before:
        raise TooManyRemovals(
            f"this run would remove {n:,} of the {before:,} documents the last run held ({n / before:.0%}), "
            f"more than source.removal_limit ({limit:.0%}) allows. Is {source_root} the whole drive, "
            f"mounted and readable? Nothing was changed. `thresher run --dry-run` lists them; to remove them, "
            f"run again with --accept-removals.")


def inside_count(plan: Plan) -> int:
    """How many live documents live inside other documents (their live path is a member's)."""
    members = {p for p, c in zip(plan.catalog.column("source_path").to_pylist(),
                                 plan.catalog.column("container_doc_id").to_pylist()) if c}
    return sum(1 for _, path, _ in plan.live.values() if path in members)


def member_chain(row_at: dict[str, dict], canonical: dict[str, str], path: str) -> tuple[str, tuple[str, ...]]:
    """For a document inside documents: the drive file that holds it and the member
    names from there down (each container by its canonical path)."""
    names: list[str] = []
    row = row_at[path]
    while row.get("container_doc_id"):
        names.append(row["member_name"])
        row = row_at[canonical[row["container_doc_id"]]]
    return row["source_path"], tuple(reversed(names))


def add_members(plan: Plan, found: list[MemberInfo]) -> list[DocJob]:
    """Documents found inside containers during the run join the catalog and the live
    documents; returns jobs for those read in this run (their later steps still to run).

    A member that is a copy of a drive file is the same document (same doc_id); the
    drive's path stands for it.
    """
    awaited_ids = {r["doc_id"] for r in plan.awaited.values()}
    if not found:
        plan.deleted = sorted(set(plan.deleted) | (awaited_ids - set(plan.live)))
        return []
    rows = {r["source_path"]: r for r in plan.catalog.to_pylist()}
    for m in found:
        prev = rows.get(m.source_path)
        same = prev is not None and prev["doc_id"] == m.doc_id
        rows[m.source_path] = {
            "source_path": m.source_path, "doc_id": m.doc_id, "size": m.size, "mtime": _ts(m.mtime),
            "first_run": prev["first_run"] if same else plan.run_id, "last_run": plan.run_id, "present": True,
            "canonical_path": None, "chain_digest": plan.chain, "container_doc_id": m.container_doc_id,
            "member_name": m.member_name,
        }
    # A member found unchanged was not opened again: what it held stays (transitively).
    unopened = {m.doc_id for m in found if not m.processed}
    found_paths = {m.source_path for m in found}
    while True:
        keep = [r for p, r in plan.awaited.items() if p not in found_paths and not rows[p]["present"]
                and r["container_doc_id"] in unopened]
        if not keep:
            break
        for r in keep:
            rows[r["source_path"]] = dict(r, present=True, last_run=plan.run_id)
            unopened.add(r["doc_id"])
    all_rows = sorted(rows.values(), key=lambda r: r["source_path"])
    canonical, live, copies = live_documents(all_rows, plan.seq_of, plan.sequence, plan.source_section)
    for r in all_rows:
        if r["present"]:
            r["canonical_path"] = canonical[r["doc_id"]]
            r["chain_digest"] = plan.chain
    inherit_container_access(all_rows)
    plan.catalog = pa.Table.from_pylist(all_rows, schema=schema.CATALOG)
    plan.live, plan.copies = live, copies
    plan.access = document_access(all_rows, plan.access_section)
    plan.deleted = sorted((set(plan.deleted) | awaited_ids) - set(live))
    jobs = []
    seen = {j.doc_id for j in plan.jobs}
    for m in found:
        if m.processed and m.doc_id not in seen:
            seen.add(m.doc_id)
            jobs.append(DocJob(m.doc_id, canonical[m.doc_id], "", m.size, m.mtime, 0, True))
    plan.jobs.extend(jobs)
    return jobs
