"""Blocks that repeat across the pages of one site: removed from HTML pages.

HTML exports of a web site carry the site's template on every page: menus, link
lists, contact lines and notices. Extraction drops what the markup says is not
content (nav, header, footer, aside...); old and hand-made sites mark nothing and put
their menus in layout tables, so this corpus step finds them by repetition instead.

Site. Pages are grouped by the folder they sit in on the drive (the path without the
file name): a saved site or intranet export keeps its pages together, while two
exports of different sites rarely share a folder. The folder, not the top folder,
because a drive's top folders are departments that hold many unrelated exports; and
not the page's declared host (<base>, canonical link), because exports often lack
both and a drive's mirror of a site should be judged by what sits together. With
`site: top_folder` the first path component is the site instead, for drives that
keep one site per top folder with its sections in subfolders.

Repetition. A paragraph block (lists are paragraphs of "- item" lines) repeats when
its normalised text (Unicode NFKC, case folded, whitespace collapsed, every run of
digits read as one digit, so "Page 3" matches "Page 12") stands on at least
`min_pages` pages of the site and on at least `min_share` of them. Such a block is
removed from every page of the site where it stands, and each removal is recorded in
the page's `removed` column with the count behind it, and summed up in a warning.
Headings, tables and code are never removed: a heading that repeats names a kind of
section ("Parameters", "Description") that the split step needs for heading paths, and
repeated tables and code are more often content than template. A site with fewer than
`min_pages` pages is left alone: too few pages to tell template from content.
A page left without blocks stays ok, with a warning saying so.
(Common practice for template removal by repetition; thresholds ours.)
"""

from __future__ import annotations

import re
import unicodedata
from collections import Counter, defaultdict
from dataclasses import replace
from typing import Literal

from pydantic import Field

from .spec import StepContext, StepParams, StepSpec
from .units import PARAGRAPH, DocPages

_WS = re.compile(r"\s+")
_DIGITS = re.compile(r"\d+")


class BoilerplateParams(StepParams):
    """Parameters of the boilerplate step."""

    min_pages: int = Field(3, ge=2, description="a block must stand on at least this many pages of its site")
    min_share: float = Field(
        0.5, gt=0.0, le=1.0,
        description="... and on at least this share of the site's pages",
    )
    site: Literal["folder", "top_folder"] = Field(
        "folder", description="what makes a site: the folder a page sits in, or its top folder",
    )


def site_of(source_path: str, how: str) -> str:
    parts = [p for p in re.split(r"[\\/]", source_path) if p]
    folders = parts[:-1]
    if not folders:
        return ""
    return folders[0] if how == "top_folder" else "/".join(folders)


def site_group(source_path: str, params: BoilerplateParams) -> str:
    """A page's site: its decisions depend on the pages of that site alone."""
    return site_of(source_path, params.site)


def block_key(text: str) -> str:
    text = unicodedata.normalize("NFKC", text).casefold()
    return _DIGITS.sub("0", _WS.sub(" ", text).strip())


def _quote(text: str, limit: int = 60) -> str:
    text = " ".join(text.split())
    return f"'{text}'" if len(text) <= limit else f"'{text[:limit - 1]}…'"


def remove_boilerplate(docs: list[DocPages], params: BoilerplateParams,
                       ctx: StepContext) -> list[DocPages]:
    sites: dict[str, list[DocPages]] = defaultdict(list)
    for doc in docs:
        sites[site_of(doc.source_path, params.site)].append(doc)

    out: list[DocPages] = []
    for site, members in sites.items():
        n = len(members)
        # On how many pages of the site each block's text stands (once per page).
        seen: Counter = Counter()
        for doc in members:
            for page in doc.pages:
                seen.update({block_key(b.text) for b in page.blocks if b.kind == PARAGRAPH})
        need = max(params.min_pages, params.min_share * n)
        repeated = {key for key, count in seen.items() if count >= need} if n >= params.min_pages else set()
        label = site or "(top of the drive)"
        for doc in members:
            pages = []
            for page in doc.pages:
                kept, removed = [], []
                for block in page.blocks:
                    key = block_key(block.text)
                    if block.kind == PARAGRAPH and key in repeated:
                        removed.append({
                            "kind": "boilerplate",
                            "text": block.text,
                            "reason": f"repeats on {seen[key]} of the {n} pages of site "
                                      f"'{label}' (at least {params.min_pages} pages and "
                                      f"{params.min_share:.0%} of them)",
                        })
                    else:
                        kept.append(block)
                warnings = list(page.warnings)
                if removed:
                    warnings.append(
                        f"removed {len(removed)} block(s) repeated across site '{label}': "
                        + "; ".join(_quote(r["text"]) for r in removed)
                    )
                    if not kept:
                        warnings.append("no text left: every block repeats across the site")
                pages.append(replace(
                    page, blocks=kept, parents=[page.locator], warnings=warnings,
                    payload={"site": label, "site_pages": n, "removed": removed},
                ))
            out.append(DocPages(doc.doc_id, doc.source_path, doc.rank, pages))
    return out


BOILERPLATE = StepSpec(
    name="boilerplate",
    version="1",
    consumes="pages",
    produces="pages",
    scope="corpus",
    params=BoilerplateParams,
    run=remove_boilerplate,
    formats=("html",),
    group=site_group,
    summary="Removes blocks that repeat across the HTML pages of one site (menus, footers).",
)
