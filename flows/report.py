"""`thresher report`: the review pages, a small summary file and a folder of pages.

`report.html` (the summary: run figures, charts, problems, the documents that need a
look) and beside it `report-pages/`: one page per live document and the full documents
list in pages of a few hundred rows. Cost follows what is shown or changed, not the
drive: the summary reads the store without any text, in batches of documents (its
doc_id filter), and a document's page is written again only when the store holds
something new for it since the report was last written into that folder (or the
report's own templates or code changed).

report_data.py reads the store, report_overview.py folds documents into the summary's
totals, report_sections.py lists the summary's sections, report_html.py draws pages.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import uuid
from dataclasses import dataclass
from pathlib import Path

from thresher.flows.report_data import ReportError, StoreView, budget_tokens, chunk_owners, gather_documents, open_view
from thresher.flows.report_html import render_document, render_list_page, render_summary, template_digest
from thresher.flows.report_overview import Overview
from thresher.flows.report_sections import list_pages, probes_and_targets
from thresher.flows.store import Store

__all__ = ["ReportError", "ReportWritten", "pages_folder", "write_report"]

# Documents read at a time: without text for the summary, with it for their pages.
SUMMARY_BATCH = 1000
PAGE_BATCH = 100
STATE_FILE = ".report-state.json"
_PAGE_NAME = re.compile(r"^[0-9a-f]{8,}\.html$")


@dataclass
class ReportWritten:
    summary: Path
    folder: Path
    documents: int
    pages_written: int
    pages_kept: int
    pages_removed: int


def pages_folder(out: Path) -> Path:
    """The folder of pages written beside a summary file: report.html -> report-pages/."""
    return out.with_name(f"{out.stem}-pages")


def _write(path: Path, text: str) -> None:
    """Under a temporary name, then renamed: a reader never sees half a page."""
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        tmp.write_bytes(text.encode("utf-8"))
        os.replace(tmp, path)
    except OSError:
        tmp.unlink(missing_ok=True)
        raise


def _batch_order(doc_ids: list[str], parts: dict[str, dict[str, list[str]]]) -> list[str]:
    """Documents in the order of the part files that hold them, so a batch read with the
    doc_id filter opens a few files, not every file of the store."""
    key = {}
    for d in doc_ids:
        key[d] = tuple(ps[d][-1] if d in ps else "" for ps in parts.values())
    return sorted(doc_ids, key=lambda d: (key[d], d))


def _fingerprints(sv: StoreView, targets_of: dict[str, list[str]], targets: dict[str, dict]) -> dict[str, str]:
    """Per document, a digest of everything its page shows: the runs that wrote it at
    each stage, its catalog rows, the chunks it links to, and the report's own version."""
    writes = {st.name: sv.view.doc_writes(st.name) for st in sv.stages}
    base = [template_digest(), sv.scope.last.manifest.get("chain_digest", ""), sv.scope.is_latest]
    out = {}
    for doc_id, rows in sv.catalog.items():
        facts = [base, [(s, writes[s].get(doc_id, [])) for s in writes],
                 [(r.get("source_path"), r.get("canonical_path"), r.get("size"), r.get("first_run")) for r in rows],
                 [(t, targets.get(t)) for t in targets_of.get(doc_id, [])]]
        out[doc_id] = hashlib.sha256(json.dumps(facts, default=str).encode()).hexdigest()[:24]
    return out


def _read_state(folder: Path) -> dict[str, str]:
    try:
        state = json.loads((folder / STATE_FILE).read_text(encoding="utf-8"))
        return dict(state.get("pages") or {})
    except (OSError, ValueError, AttributeError):
        return {}


def write_report(store: Store, out_path: str | os.PathLike[str], run_id: str | None = None) -> ReportWritten:
    """Write the summary to `out_path` and the pages into the folder beside it.

    Raises ReportError (one-line message) when the store has no committed run, the
    run is unknown, or a file cannot be written.
    """
    out = Path(out_path).expanduser()
    if out.is_dir():
        raise ReportError(f"{out} is a folder; give a file name such as {out / 'report.html'}")
    folder = pages_folder(out)
    sv = open_view(store, run_id)
    prefix = f"{folder.name}/"
    ov = Overview(scope=sv.scope, stages=sv.stages, store_root=store.root, href=lambda d: f"{d}.html",
                  budget_tokens=budget_tokens(sv.stages))
    doc_ids = sv.doc_ids
    parts = {st.name: sv.view.doc_parts(st.name) for st in sv.stages}
    in_order = _batch_order(doc_ids, parts)
    targets_of: dict[str, list[str]] = {}
    for i in range(0, len(in_order), SUMMARY_BATCH):
        for doc in gather_documents(sv, in_order[i:i + SUMMARY_BATCH], light=True):
            ov.add(doc)
            dups = sorted({c.duplicate_of for c in doc.chunks if c.duplicate_of})
            if dups:
                targets_of[doc.doc_id] = dups
    ov.finish()
    owners = chunk_owners(sv, {t for ts in targets_of.values() for t in ts})
    targets = {c: {"href": f"{d}.html#c-{c}", "index": i, "path": ov.path_of(d)} for c, (d, i) in owners.items()}
    ov.list_pages = list_pages(ov, lambda n: f"list-{n}.html")
    ov.probes, ov.targets = probes_and_targets(store, sv.scope.last.manifest)
    fingerprints = _fingerprints(sv, targets_of, targets)

    try:
        folder.mkdir(parents=True, exist_ok=True)
        before = _read_state(folder)
        changed = [d for d in in_order if before.get(d) != fingerprints[d] or not (folder / f"{d}.html").exists()]
        summary_href = f"../{out.name}"
        # The list's first page, not the one holding the document: a page kept as it is
        # must not point at a list page that now holds other rows.
        first_list = ov.list_pages[0]["href"]
        written = 0
        for i in range(0, len(changed), PAGE_BATCH):
            # Only the pages being written hold every stage's rows and texts at once.
            for doc in gather_documents(sv, changed[i:i + PAGE_BATCH], count=False):
                _write(folder / f"{doc.doc_id}.html",
                       render_document(ov, doc, targets, summary_href, first_list))
                written += 1
        removed = 0
        live = set(doc_ids)
        for f in folder.iterdir():
            if (_PAGE_NAME.match(f.name) and f.stem not in live) or (
                    f.name.startswith("list-") and f.name not in {p["href"] for p in ov.list_pages}):
                f.unlink()
                removed += _PAGE_NAME.match(f.name) is not None
        for page in ov.list_pages:
            _write(folder / page["href"], render_list_page(ov, page, summary_href))
        _write(folder / STATE_FILE, json.dumps({"pages": fingerprints}, sort_keys=True))
        _write(out, render_summary(ov, prefix))
    except OSError as exc:
        raise ReportError(f"cannot write {exc.filename or out}: {exc.strerror or exc}") from None
    return ReportWritten(out.resolve(), folder.resolve(), len(doc_ids), written, len(doc_ids) - written, removed)
