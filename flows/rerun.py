"""Choosing what `thresher rerun` re-executes, and the plan that does only that.

A re-run starts one step for chosen units (a document, a page, or every failed unit)
from the previous stage's stored rows, then runs the later steps of those documents
and the corpus-wide steps as far as they are affected. Nothing else is recomputed.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from thresher.flows.access import document_access
from thresher.flows.config import AccessSection, FlowDefinition, SourceSection
from thresher.flows.discover import file_doc_id
from thresher.flows.execute import DocJob
from thresher.flows.plan import Plan, member_chain
from thresher.flows.store import Store
from thresher.steps.units import DOCUMENT_LOCATOR, FAILED, page_locator


class RerunError(ValueError):
    """The re-run cannot be done as asked; the message says why."""


@dataclass
class RerunTarget:
    doc_id: str
    source_path: str
    step: int  # index into the chain
    locators: list[str] | None  # units of that step to redo; None = the whole document
    why: str


def _stage_index(definition: FlowDefinition, name: str) -> int:
    for i, s in enumerate(definition.steps):
        if s.name == name:
            return i
    raise RerunError(f"no step {name!r} in the flow definition; steps are {', '.join(s.name for s in definition.steps)}")


def _failed_units(definition: FlowDefinition, store: Store, doc_ids: list[str]) -> dict[str, list[tuple[int, dict]]]:
    """Per document, its failed units in the current view as (step index, row)."""
    out: dict[str, list[tuple[int, dict]]] = {}
    for i, step in enumerate(definition.steps):
        # A damaged part (see `thresher verify`) must not stop the re-run that repairs it.
        t = store.current(step.name, step.spec.produces, doc_ids, columns=["doc_id", "locator", "page", "status", "reason"],
                          tolerant=True)
        for row in t.to_pylist():
            if row["status"] == FAILED:
                out.setdefault(row["doc_id"], []).append((i, row))
    return out


def target_for_document(definition: FlowDefinition, store: Store, doc_id: str, source_path: str,
                        page: int | None, step_name: str | None) -> RerunTarget:
    failed = _failed_units(definition, store, [doc_id]).get(doc_id, [])
    if page is not None:
        failed = [(i, r) for i, r in failed if r["page"] == page or r["locator"] == DOCUMENT_LOCATOR]
    if step_name is not None:
        index = _stage_index(definition, step_name)
    else:
        index = min((i for i, _ in failed), default=0)
    step = definition.steps[index]
    if page is None:
        return RerunTarget(doc_id, source_path, index, None, f"{step.name} for the whole document")
    if step.spec.produces != "pages":
        return RerunTarget(doc_id, source_path, index, None,
                           f"{step.name} works on chunks: re-running it for the whole document")
    stage_failed_whole = any(i == index and r["locator"] == DOCUMENT_LOCATOR for i, r in failed)
    if stage_failed_whole:
        return RerunTarget(doc_id, source_path, index, None,
                           f"{step.name} failed for the whole document: re-running the whole document")
    return RerunTarget(doc_id, source_path, index, [page_locator(page)], f"{step.name} for page {page}")


def targets_for_failed(definition: FlowDefinition, store: Store, live: dict[str, tuple[int, str, int]]) -> list[RerunTarget]:
    """Every live document with a failed unit: from its earliest failing step, those units."""
    targets = []
    for doc_id, units in sorted(_failed_units(definition, store, sorted(live)).items()):
        index = min(i for i, _ in units)
        at = [r for i, r in units if i == index]
        step = definition.steps[index]
        whole = step.spec.produces != "pages" or any(r["locator"] == DOCUMENT_LOCATOR for r in at)
        locators = None if whole else sorted({r["locator"] for r in at})
        what = "the whole document" if whole else ", ".join(locators)
        targets.append(RerunTarget(doc_id, live[doc_id][1], index, locators, f"{step.name} for {what}"))
    return targets


def make_rerun_plan(store: Store, targets: list[RerunTarget], source_root: str,
                    live: dict[str, tuple[int, str, int]], copies: dict[str, list[str]], access: AccessSection | None = None,
                    source: SourceSection | None = None) -> Plan:
    """A plan for just these targets; `live` and `copies` as plan.live_documents gives them."""
    catalog = store.catalog()
    size_of = {r["source_path"]: r for r in catalog.to_pylist()}
    canonical = {d: v[1] for d, v in live.items()}
    jobs = []
    for t in targets:
        if t.doc_id not in live:
            raise RerunError(f"{t.source_path} is no longer in the source folder; nothing to re-run")
        path = live[t.doc_id][1]
        entry = size_of[path]
        # A document inside documents is unpacked again from the drive file holding it.
        outer, inside = member_chain(size_of, canonical, path)
        abs_path = str(Path(source_root) / outer)
        if t.step == 0:
            try:
                found = file_doc_id(abs_path)
            except OSError as exc:
                raise RerunError(f"cannot read {abs_path}: {exc.strerror or exc}") from None
            if found != size_of[outer]["doc_id"]:
                raise RerunError(f"{outer} changed since it was catalogued (its content hash differs); "
                                 "run `thresher run` to process the new version")
        mtime = entry["mtime"].timestamp() if entry.get("mtime") else 0.0
        jobs.append(DocJob(t.doc_id, path, abs_path, int(entry.get("size") or 0), mtime, t.step, True, t.locators,
                           member_of=inside))
    return Plan(catalog=catalog, jobs=jobs, skipped=[], deleted=[], live=live, copies=copies,
                access=document_access(catalog.to_pylist(), access or AccessSection()),
                access_section=access or AccessSection(), source_section=source or SourceSection(),
                previous_live={d: v[1] for d, v in live.items()})  # a re-run keeps the catalog


def describe(targets: list[RerunTarget]) -> list[str]:
    return [f"{t.source_path}: {t.why}" for t in targets]

