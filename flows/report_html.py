"""The review pages drawn from Jinja2 templates (report_templates/) with automatic
escaping: whatever a template prints is escaped unless it is our own style sheet, so a
document's text, path, title or heading cannot become markup, and a forgotten escape
cannot happen. No page has a script (a Content-Security-Policy forbids any) or asks
for anything outside the report's folder.
"""

from __future__ import annotations

import base64
import hashlib
from functools import lru_cache
from pathlib import Path
from typing import Any

import jinja2
from markupsafe import Markup

from thresher.flows.report_data import DocumentView, SEVERITY
from thresher.flows.report_diff import comparison, diff_segments, single  # noqa: F401 (diff_segments re-exported)
from thresher.flows.report_overview import Overview, suffix
from thresher.flows.report_sections import SECTIONS

TEMPLATES = Path(__file__).with_name("report_templates")


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    return jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)), autoescape=True,
                              undefined=jinja2.StrictUndefined, keep_trailing_newline=True)


@lru_cache(maxsize=1)
def _style() -> tuple[Markup, str]:
    css = (TEMPLATES / "report.css").read_text(encoding="utf-8")
    digest = base64.b64encode(hashlib.sha256(css.encode("utf-8")).digest()).decode()
    # Only the one style block may apply; no script, no request of any kind.
    csp = (f"default-src 'none'; script-src 'none'; style-src 'sha256-{digest}'; img-src 'none'; "
           "font-src 'none'; connect-src 'none'; media-src 'none'; object-src 'none'; frame-src 'none'; "
           "base-uri 'none'; form-action 'none'")
    return Markup(css), csp


def template_digest() -> str:
    """Changes whenever a template, the style sheet or the report code changes, so
    document pages written by an older version are written again."""
    h = hashlib.sha256()
    files = sorted(TEMPLATES.rglob("*")) + sorted(Path(__file__).parent.glob("report*.py"))
    for f in files:
        if f.is_file():
            h.update(f.name.encode())
            h.update(f.read_bytes())
    return h.hexdigest()[:16]


def _page(template: str, ov: Overview, **ctx: Any) -> str:
    css, csp = _style()
    generated = ov.generated_at.strftime("%Y-%m-%d %H:%M %Z").strip()
    return environment().get_template(template).render(css=css, csp=csp, scope=ov.scope, ov=ov,
                                                        generated=generated, **ctx)


def render_summary(ov: Overview, prefix: str) -> str:
    """The summary page; `prefix` leads from it to the folder of pages ("report-pages/")."""
    sections = [{"key": s.key, "title": s.title, "template": s.template, "ctx": s.context(ov)} for s in SECTIONS]
    return _page("summary.html", ov, sections=sections, prefix=prefix)


def render_list_page(ov: Overview, page: dict[str, Any], summary_href: str) -> str:
    return _page("documents_list.html", ov, rows=page["rows"], number=page["number"], pages=ov.list_pages,
                 first=page["first"], last=page["last"], total=len(ov.rows), summary_href=summary_href, prefix="")


_DUPLICATE_WORDS = {"exact": "exact duplicate of", "near": "near-duplicate of",
                    "document": "the whole document is a copy; this chunk is kept as"}


def render_document(ov: Overview, doc: DocumentView, targets: dict[str, dict[str, Any]],
                    summary_href: str, list_href: str) -> str:
    """One document's page. `targets`: chunk_id -> {href, index, path} of the chunks
    this document's dropped chunks duplicate."""
    pages = []
    for pv in doc.pages:
        first, last, changed = pv.texts()
        pg: dict[str, Any] = {"view": pv, "id": f"p-{doc.doc_id}-{pv.locator.replace('/', '-')}",
                              "same": None, "left": None}
        if first is not None and last is not None:
            if first is last or first.text == last.text:
                pg.update(same=single(first.text or ""), chars=len(first.text or ""),
                          stages=", ".join(u.stage for u in pv.stages if u.text is not None))
            else:
                left, right, removed, inserted = comparison(first.text or "", last.text or "")
                pg.update(left=left, right=right, removed=removed, inserted=inserted, changed=", ".join(changed),
                          before_label=f"as extracted ({first.stage})", after_label=f"after {', '.join(changed)}")
        pages.append(pg)
    chunks = []
    for cv in doc.chunks:
        bits = [f"#{cv.index}"] + ([cv.pages] if cv.pages else [])
        bits.append(f"{cv.tokens:,} tokens" if cv.tokens is not None else "tokens not counted")
        if cv.language:
            bits.append(cv.language)
        kind = cv.duplicate_kind or ""
        chunks.append({"view": cv, "heading": " › ".join(cv.heading_path) or "(no heading)", "bits": bits,
                       "words": _DUPLICATE_WORDS.get(kind, f"{kind} duplicate of".strip()),
                       "target": targets.get(cv.duplicate_of) if cv.duplicate_of else None,
                       "text": single(cv.text)})
    stage_counts = [(s.name, _status_counts(doc.by_stage[s.name])) for s in ov.stages if s.name in doc.by_stage]
    return _page("document.html", ov, doc=doc, pages=pages, chunks=chunks, stage_counts=stage_counts,
                 fmt=doc.format or suffix(doc.path), summary_href=summary_href, list_href=list_href, prefix="")


def _status_counts(counts: dict[str, int]) -> str:
    keys = [s for s in ("ok",) + SEVERITY[:-1] if counts.get(s)] + sorted(k for k in counts if k not in SEVERITY)
    return ", ".join(f"{counts[k]:,} {k}" for k in keys) or "none"


def render_comparison(before: str, after: str, before_label: str, after_label: str) -> tuple[str, int, int]:
    """Side-by-side panes as HTML, and the number of characters removed and inserted."""
    left, right, removed, inserted = comparison(before, after)
    macro = environment().get_template("macros.html").module.comparison
    return str(macro(left, right, before_label, after_label)), removed, inserted
