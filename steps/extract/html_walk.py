"""HTML to blocks, parsed with beautifulsoup4 on lxml (shared by every reader that meets HTML).

Dropped with everything inside: script, style, noscript, template, nav, aside, form
and form controls, embedded objects, anything marked hidden (the `hidden` attribute,
aria-hidden="true", an inline display:none), and the ARIA landmarks that mean the
same as the dropped elements (navigation, banner, contentinfo, complementary, search).
`header` and `footer` are dropped when they belong to the page as a whole; inside an
article, section or main they introduce or close that content (HTML standard, the
header and footer elements) and are kept.

Kept, in document order: h1-h6 as headings of that rank (the HTML standard's heading
ranks), paragraphs and other block containers as paragraphs, lists as one paragraph
of "- item" / "3. item" lines (two spaces of indent per nesting level), pre as CODE,
tables as TABLE blocks (thead rows first, tfoot rows last; a cell spanning n columns
is followed by n-1 empty cells). A table with fewer than 2 rows or 2 columns, or with
a table inside it, is layout rather than data: its content is read as ordinary blocks.
The title is <title>, else the first heading.
"""

from __future__ import annotations

import re
import warnings

from bs4 import BeautifulSoup, NavigableString, Tag, XMLParsedAsHTMLWarning
from bs4.element import PreformattedString

from .blocks import (
    code_block,
    heading_block,
    inline,
    list_block,
    paragraph_block,
    table_block,
    table_shape,
)

DROP = {
    "script", "style", "noscript", "template", "nav", "aside", "form", "button",
    "select", "textarea", "input", "option", "datalist", "iframe", "object", "embed",
    "canvas", "svg", "math", "audio", "video", "map", "head", "title", "meta", "link",
    "dialog",
}
DROP_ROLES = {"navigation", "banner", "contentinfo", "complementary", "search"}
SECTIONING = {"article", "section", "main", "aside", "nav", "blockquote", "details",
              "fieldset", "figure", "td", "th"}
HEADINGS = {"h1": 1, "h2": 2, "h3": 3, "h4": 4, "h5": 5, "h6": 6}
LISTS = {"ul", "ol", "menu", "dir"}
# Elements that end the running paragraph before and after them.
BLOCKISH = {
    "address", "article", "blockquote", "body", "center", "dd", "details", "div", "dl",
    "dt", "fieldset", "figcaption", "figure", "footer", "header", "hgroup", "hr", "html",
    "legend", "li", "main", "p", "section", "summary", "caption", "tbody", "thead",
    "tfoot", "tr", "td", "th", "table", "pre", "h1", "h2", "h3", "h4", "h5", "h6",
    "ul", "ol", "menu", "dir", "search",
}
_HIDDEN_STYLE = re.compile(r"display\s*:\s*none|visibility\s*:\s*hidden", re.IGNORECASE)


def parse_html(markup: str | bytes) -> BeautifulSoup:
    """The soup every reader walks. XHTML is read as HTML on purpose (browsers do so for
    pages served as HTML). Attributes stay strings: splitting `class` and the like into
    lists, which no rule here reads, was 8 % of reading the HTML of the Debian
    documentation drive (cProfile)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", XMLParsedAsHTMLWarning)
        return BeautifulSoup(markup, "lxml", multi_valued_attributes=None)


def _tags(children, names) -> list[Tag]:
    """The elements among `children` named in `names`. (bs4's find_all builds a filter
    on every call: 6.6 s of the 86 s cProfile gave that drive's HTML.)"""
    return [c for c in children if isinstance(c, Tag) and c.name in names]


def _dropped(tag: Tag) -> bool:
    name = tag.name
    if name in DROP:
        return True
    attrs = tag.attrs or {}
    if "hidden" in attrs or str(attrs.get("aria-hidden", "")).lower() == "true":
        return True
    if _HIDDEN_STYLE.search(str(attrs.get("style", ""))):
        return True
    if str(attrs.get("role", "")).lower() in DROP_ROLES:
        return True
    if name in ("header", "footer"):
        return not any(p.name in SECTIONING for p in tag.parents if isinstance(p, Tag))
    return False


def inline_text(node: Tag) -> str:
    """The text of an element as one line; block boundaries and <br> become spaces."""
    out: list[str] = []

    def walk(el: Tag) -> None:
        for child in el.children:
            if isinstance(child, NavigableString):
                if not isinstance(child, PreformattedString):
                    out.append(str(child))
            elif isinstance(child, Tag) and not _dropped(child):
                if child.name == "br" or child.name in BLOCKISH:
                    out.append(" ")
                walk(child)
                if child.name in BLOCKISH:
                    out.append(" ")
                if child.name == "img" and child.get("alt"):
                    out.append(str(child.get("alt")))

    walk(node)
    return inline("".join(out))


def _rows(table: Tag) -> list[list[str]] | None:
    """Rows of a data table, or None when the table is layout."""
    if _tags(table.descendants, ("table",)):
        return None
    head, body, foot = [], [], []
    for tr in _tags(table.descendants, ("tr",)):
        section = next((p for p in tr.parents if p.name in ("thead", "tfoot", "table")), None)
        row: list[str] = []
        for cell in _tags(tr.children, ("td", "th")):
            row.append(inline_text(cell))
            try:
                span = int(str(cell.get("colspan", "1")).strip() or 1)
            except ValueError:
                span = 1
            row.extend([""] * max(0, min(span, 100) - 1))
        target = head if section is not None and section.name == "thead" else (
            foot if section is not None and section.name == "tfoot" else body)
        target.append(row)
    rows = head + body + foot
    n_rows, n_cols = table_shape(rows)
    if n_rows < 2 or n_cols < 2:
        return None
    return rows


class Walker:
    def __init__(self) -> None:
        self.blocks: list = []
        self.buf: list[str] = []

    def flush(self) -> None:
        text = "".join(self.buf)
        self.buf.clear()
        # Collapse whitespace, keeping <br> line breaks (marked "\n") as lines.
        lines = [inline(part) for part in text.split("\n")]
        block = paragraph_block("\n".join(line for line in lines if line))
        if block:
            self.blocks.append(block)

    def emit(self, block) -> None:
        if block:
            self.flush()
            self.blocks.append(block)

    def list_lines(self, node: Tag, depth: int, out: list[str]) -> None:
        ordered = node.name == "ol"
        try:
            number = int(str(node.get("start", "1")).strip() or 1)
        except ValueError:
            number = 1
        for li in _tags(node.children, ("li",)):
            if _dropped(li):
                continue
            nested = [c for c in li.children if isinstance(c, Tag) and c.name in LISTS]
            for sub in nested:
                sub.extract()
            text = inline_text(li)
            marker = f"{number}." if ordered else "-"
            if text:
                out.append("  " * depth + f"{marker} {text}")
            number += 1
            for sub in nested:
                if not _dropped(sub):
                    self.list_lines(sub, depth + 1, out)
        # Stray text directly in the list (invalid, but seen): keep it as a line.
        loose = inline("".join(str(c) for c in node.children
                               if isinstance(c, NavigableString)
                               and not isinstance(c, PreformattedString)))
        if loose:
            out.append("  " * depth + loose)

    def walk(self, node: Tag) -> None:
        for child in node.children:
            if isinstance(child, NavigableString):
                if not isinstance(child, PreformattedString):
                    self.buf.append(str(child).replace("\n", " "))
                continue
            if not isinstance(child, Tag) or _dropped(child):
                continue
            name = child.name
            if name in HEADINGS:
                self.emit(heading_block(inline_text(child), HEADINGS[name]))
            elif name in LISTS:
                lines: list[str] = []
                self.list_lines(child, 0, lines)
                self.emit(list_block(lines))
            elif name == "pre":
                self.emit(code_block(child.get_text()))
            elif name == "table":
                rows = _rows(child)
                if rows is None:
                    self.flush()
                    self.walk(child)
                    self.flush()
                else:
                    self.emit(table_block(rows))
            elif name == "br":
                self.buf.append("\n")
            elif name in BLOCKISH:
                self.flush()
                self.walk(child)
                self.flush()
            else:
                if name == "img" and child.get("alt"):
                    self.buf.append(f" {child.get('alt')} ")
                self.walk(child)


def visible_text(html: str) -> str:
    """The text a reader would see in an HTML fragment, as one line (same drop rules)."""
    soup = parse_html(html)
    walker = Walker()
    walker.walk(soup)
    walker.flush()
    return inline(" ".join(b.text for b in walker.blocks))
