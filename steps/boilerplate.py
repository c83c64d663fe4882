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
the page's `removed` column with the rule behind it (the thresholds and the site), and
summed up in a warning.
Headings, tables and code are never removed: a heading that repeats names a kind of
section ("Parameters", "Description") that the split step needs for heading paths, and
repeated tables and code are more often content than template. A site with fewer than
`min_pages` pages is left alone: too few pages to tell template from content.
A page left without blocks stays ok, with a warning saying so.
(Common practice for template removal by repetition; thresholds ours.)

Incremental (steps/incremental.py, IncrementalPageSpec). A page's row keeps the
fingerprints of its paragraph blocks (`block_keys`) and those it lost
(`removed_keys`). A later run sketches only the pages that changed, decides each site
concerned from the fresh sketches plus the stored fingerprints of its other pages (no
text read), and applies the decision to the changed pages and to the stored pages
whose removed blocks changed; no other page is read. Per-row facts are page-local for
that reason: a row names the rule and the site, not the site's page count nor on how
many pages a block stands, which a page added elsewhere in the site would change.
Those counts are given once per site decided, in the run's log (`describe`).
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from collections import Counter, defaultdict
from dataclasses import replace
from typing import Literal

import pyarrow as pa
from pydantic import Field

from .incremental import IncrementalPageSpec
from .spec import StepContext, StepParams
from .units import PARAGRAPH, DocPages, Page

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


# Fingerprints of the block texts seen, so that a site's template blocks (on every
# page) and the corpus step's two passes over the same pages (sketch, then apply) work
# each text out once. Emptied when the texts held pass FINGERPRINT_CHARS (ours: tens of
# MB at most; the documentation drive's 1,899 HTML pages hold 44,866 distinct
# paragraphs, 15 MB). A cache of 8,192 texts, smaller than that, missed on nearly every
# block of the second pass (apply 0.82 s -> 0.08 s of CPU there, scratch timing).
FINGERPRINT_CHARS = 16_000_000
_prints: dict[str, int] = {}
_held = 0


def fingerprint(text: str) -> int:
    """A block's fingerprint: 64 bits of BLAKE2b over its block_key. Stored per page, so
    a later run decides a site from its pages' fingerprints without their text (two
    different blocks share one with odds of about n^2 / 2^65 for n distinct blocks)."""
    global _held
    known = _prints.get(text)
    if known is not None:
        return known
    key = int.from_bytes(hashlib.blake2b(block_key(text).encode(), digest_size=8).digest(), "little")
    if _held + len(text) > FINGERPRINT_CHARS:
        _prints.clear()
        _held = 0
    _prints[text] = key
    _held += len(text)
    return key


def page_keys(page: Page) -> list[int]:
    """The distinct fingerprints of a page's paragraph blocks, sorted."""
    return sorted({fingerprint(b.text) for b in page.blocks if b.kind == PARAGRAPH})


def _quote(text: str, limit: int = 60) -> str:
    text = " ".join(text.split())
    return f"'{text}'" if len(text) <= limit else f"'{text[:limit - 1]}…'"


def _label(site: str) -> str:
    return site or "(top of the drive)"


def sketch(docs: list[DocPages], params: BoilerplateParams, ctx: StepContext) -> pa.Table:
    """One row per page: its document, locator and block fingerprints (`block_keys`).
    Depends on the page alone."""
    rows = [(d.doc_id, p.locator, page_keys(p)) for d in docs for p in d.pages]
    return pa.table({"doc_id": pa.array([r[0] for r in rows], pa.string()),
                     "locator": pa.array([r[1] for r in rows], pa.string()),
                     "block_keys": pa.array([r[2] for r in rows], pa.list_(pa.uint64()))})


def _count(table: pa.Table, params: BoilerplateParams) -> tuple[list[str], list[list[int]], Counter,
                                                                 dict[str, Counter], dict[str, set[int]]]:
    """Per page its site and fingerprints; per site its pages, on how many pages each
    fingerprint stands, and the repeated set."""
    keys = table.column("block_keys").to_pylist()
    sites = [site_of(p, params.site) for p in table.column("source_path").to_pylist()]
    pages: Counter = Counter(sites)
    seen: dict[str, Counter] = defaultdict(Counter)
    for site, ks in zip(sites, keys):
        seen[site].update(ks)  # distinct per page: counts pages
    repeated: dict[str, set[int]] = {}
    for site, n in pages.items():
        need = max(params.min_pages, params.min_share * n)
        repeated[site] = {k for k, c in seen[site].items() if c >= need} if n >= params.min_pages else set()
    return sites, keys, pages, seen, repeated


def describe(table: pa.Table, params: BoilerplateParams, ctx: StepContext) -> list[str]:
    """One line per site decided, for the run's log: the counts over a site live here,
    not in its pages' rows."""
    _, _, pages, seen, repeated = _count(table, params)
    lines = []
    for site in sorted(pages):
        n, rep = pages[site], sorted((seen[site][k] for k in repeated[site]), reverse=True)
        line = f"site '{_label(site)}': {n} page(s), {len(rep)} block(s) repeated"
        if rep:
            shown = ", ".join(map(str, rep[:5])) + (", ..." if len(rep) > 5 else "")
            line += f" (on {shown} pages; at least {max(params.min_pages, params.min_share * n):g} needed)"
        lines.append(line)
    return lines


def decide(table: pa.Table, params: BoilerplateParams, ctx: StepContext) -> pa.Table:
    """Which blocks each page loses, from every live page's fingerprints.

    `table` holds every page of the sites concerned (fresh sketches and stored rows
    alike; see steps/incremental.py). A site's repeated set is counted over its pages;
    a page loses the fingerprints of its own that are in it (`removed_keys`). Returns
    fresh pages, and stored pages whose site or removed_keys differ from their row.
    """
    sites, keys, _, _, repeated = _count(table, params)
    out: dict[str, list] = {"doc_id": [], "locator": [], "site": [], "removed_keys": []}
    fresh = table.column("fresh").to_pylist()
    old_site = table.column("site").to_pylist()
    old_removed = table.column("removed_keys").to_pylist()
    docs, locators = table.column("doc_id").to_pylist(), table.column("locator").to_pylist()
    for i, (site, ks) in enumerate(zip(sites, keys)):
        label, removed = _label(site), [k for k in ks if k in repeated[site]]
        if fresh[i] or old_site[i] != label or old_removed[i] != removed:
            out["doc_id"].append(docs[i])
            out["locator"].append(locators[i])
            out["site"].append(label)
            out["removed_keys"].append(removed)
    return pa.table({"doc_id": pa.array(out["doc_id"], pa.string()),
                     "locator": pa.array(out["locator"], pa.string()),
                     "site": pa.array(out["site"], pa.string()),
                     "removed_keys": pa.array(out["removed_keys"], pa.list_(pa.uint64()))})


def apply(doc: DocPages, decisions: dict[str, dict], params: BoilerplateParams, ctx: StepContext) -> DocPages:
    """The document's pages without the blocks decided (`decisions`: locator -> site
    and removed_keys). What a row says is the page's own: its blocks, what it lost and
    the rule (thresholds and site), never a count over the site, so a page added to
    the site rewrites no other page's row unless what that page keeps changes."""
    pages = []
    for page in doc.pages:
        label = decisions[page.locator]["site"]
        gone = set(decisions[page.locator]["removed_keys"])
        prints = [fingerprint(b.text) if b.kind == PARAGRAPH else None for b in page.blocks]
        own = sorted({k for k in prints if k is not None})
        kept, removed = [], []
        for block, key in zip(page.blocks, prints):
            if key is not None and key in gone:
                removed.append({
                    "kind": "boilerplate",
                    "text": block.text,
                    "reason": f"repeats across site '{label}': on at least {params.min_pages} of its pages "
                              f"and {params.min_share:.0%} of them",
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
            payload={"site": label, "removed": removed, "block_keys": own,
                     "removed_keys": sorted(gone.intersection(own))},
        ))
    return DocPages(doc.doc_id, doc.source_path, doc.rank, pages)


def remove_boilerplate(docs: list[DocPages], params: BoilerplateParams,
                       ctx: StepContext) -> list[DocPages]:
    """The whole step at once (callers without a store): sketch, decide, apply."""
    # Keyed by position: callers without a store may give documents no distinct ids.
    table = sketch([replace(d, doc_id=str(i)) for i, d in enumerate(docs)], params, ctx)
    table = table.append_column("source_path", pa.array([docs[int(i)].source_path
                                                         for i in table.column("doc_id").to_pylist()], pa.string())) \
        .append_column("fresh", pa.array([True] * table.num_rows, pa.bool_())) \
        .append_column("site", pa.nulls(table.num_rows, pa.string())) \
        .append_column("removed_keys", pa.nulls(table.num_rows, pa.list_(pa.uint64())))
    decided: dict[str, dict[str, dict]] = defaultdict(dict)
    for r in decide(table, params, ctx).to_pylist():
        decided[r["doc_id"]][r["locator"]] = r
    return [apply(d, decided[str(i)], params, ctx) for i, d in enumerate(docs)]


BOILERPLATE = IncrementalPageSpec(
    name="boilerplate",
    version="2",
    consumes="pages",
    produces="pages",
    scope="corpus",
    params=BoilerplateParams,
    run=remove_boilerplate,
    formats=("html",),
    group=site_group,
    sketch=sketch,
    decide=decide,
    apply=apply,
    describe=describe,
    sketch_columns=("block_keys",),
    decision_columns=("site", "removed_keys"),
    summary="Removes blocks that repeat across the HTML pages of one site (menus, footers).",
)
