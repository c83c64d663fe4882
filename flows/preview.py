"""What a run would do, without doing it: `thresher run --dry-run`.

The run's own scan and plan, and nothing else: no Prefect, no lock, no worker, and the
store is only read. A file new or changed by its stat record is read to hash, as the
run would; documents inside archives and e-mails are found only when their container
is read, so a container to process stands for them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from thresher.flows.config import FlowDefinition
from thresher.flows.discover import ScanProblem
from thresher.flows.plan import TooManyRemovals, check_removals, scan_and_plan
from thresher.flows.store import Store
from thresher.steps.units import shown


@dataclass
class Preview:
    files: int  # files the scan found
    hashed: int  # of them, read to hash (new, or changed by their stat record)
    live: int  # distinct documents after the run (before any found inside containers)
    unchanged: int
    process: list[tuple[str, str]] = field(default_factory=list)  # (path, why), path order
    removed: list[str] = field(default_factory=list)  # last paths of documents no longer found
    held: list[str] = field(default_factory=list)  # paths kept as stored: unreadable now
    problems: list[ScanProblem] = field(default_factory=list)
    refusal: str | None = None  # why the run would stop before changing anything


def preview(definition: FlowDefinition, source_root: str, store_root: str, force: bool = False,
            verify: bool = False) -> Preview:
    store = Store(store_root)
    files, problems, plan = scan_and_plan(definition, store, source_root, "dry-run", store.next_sequence(),
                                          force, verify)
    refusal = None
    try:
        check_removals(plan, definition.model.source.removal_limit, source_root)
    except TooManyRemovals as exc:
        refusal = str(exc)
    steps = [s.name for s in definition.steps]

    def why(known: bool, start: int) -> str:
        if not known:
            return "new or edited"
        if force:
            return "forced (--force)"
        return f"processed before with another definition: from step {steps[start]}"

    return Preview(
        files=len(files), hashed=sum(f.hashed for f in files), live=len(plan.live),
        unchanged=plan.unchanged,
        process=sorted((j.source_path, why(j.known, j.start)) for j in plan.jobs),
        removed=sorted(path or d for d, path in plan.removed_paths.items()),
        held=sorted(plan.live[d][1] for d in plan.held),
        problems=problems, refusal=refusal)


def preview_lines(p: Preview, limit: int = 20) -> list[str]:
    """The preview as a person reads it, at most `limit` paths a list."""
    lines = [f"  files      {p.files} found, {p.hashed} read to hash (the rest matched their stat record)",
             f"  documents  {p.live} live after the run: {len(p.process)} to process, {p.unchanged} unchanged, "
             f"{len(p.removed)} removed, {len(p.held)} held (unreadable now, kept as stored)"]
    sections = (("to process", p.process), ("removed", [(x, "") for x in p.removed]),
                ("held", [(x, "") for x in p.held]),
                ("cannot read", [(x.source_path, x.reason) for x in p.problems]))
    for title, items in sections:
        if not items:
            continue
        lines.append(f"  {title}" + (f" (the first {limit} of {len(items)})" if len(items) > limit else "") + ":")
        lines += [f"    {shown(path)}" + (f"  {note}" if note else "") for path, note in items[:limit]]
    if p.refusal:
        lines.append(f"  the run would stop: {p.refusal}")
    return lines
