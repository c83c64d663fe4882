"""HTML to blocks, parsed by lxml (libxml2's HTML parser) and walked as lxml elements
(shared by every reader that meets HTML).

Dropped with everything inside: script, style, noscript, template, nav, aside, form
and form controls, embedded objects, anything marked hidden (the `hidden` attribute,
aria-hidden="true", an inline display:none), the ARIA landmarks that mean the
same as the dropped elements (navigation, banner, contentinfo, complementary, search),
a heading's permalink (a link to "#..." whose text is only a sign such as "¶"),
and a page-to-page navigation bar (`_navigation_bar`: DocBook's and Texinfo's
Prev / Up / Next).
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

from bs4.dammit import UnicodeDammit
from lxml import etree

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
# Link types of the HTML standard (and HTML 4's) that move between the pages of one
# work, and the bound on a navigation bar's size: at most this many elements, and this
# many characters of text per link (the linked pages' titles; ours, from DocBook's and
# Texinfo's bars, 55-80 characters for 2-4 links).
_NAV_RELS = frozenset({"next", "prev", "previous", "up", "index", "contents", "toc", "start", "first", "last"})
NAV_BAR_ELEMENTS = 200
NAV_BAR_CHARS_PER_LINK = 60
# A link to a place in the same page whose text is only these signs is a heading's
# permalink (Sphinx's "¶", rustdoc's "§", "#" or a link symbol elsewhere): without this
# it ended every heading ("1. About this manual¶"). Signs from the generators' pages
# on this machine; no standard names them. Its text is a sign or two, with spaces.
PERMALINK_CHARS = 16
_PERMALINK_SIGNS = re.compile("[\\s\u00a7\u00b6#\U0001f517\u2693\u200b\ufe0e\ufe0f]+")


# Elements whose own text a <pre>'s text leaves out, as beautifulsoup4's get_text does
# (the walk drops these elements everywhere else).
_UNSEEN_TEXT = {"script", "style", "template"}


def parse_html(markup: str | bytes):
    """The document's root element (None for a document with no element), parsed the
    way beautifulsoup4 parses with its "lxml" builder: libxml2's HTML parser, recovering
    from errors, fed the whole text. XHTML is read as HTML on purpose (browsers do so
    for pages served as HTML). Bytes are decoded first with beautifulsoup4's own
    detector (UnicodeDammit: byte-order mark, declared encoding, UTF-8, windows-1252).

    Not beautifulsoup4's tree: building it called back into Python for every element
    and string, 77 % of reading the Debian documentation drive's HTML (cProfile, 1,901
    files, 42 MB); the same walk over lxml's own tree gives the same blocks
    (tests/test_html_walk.py). `huge_tree`: without it libxml2's tree keeps 256 levels
    and drops what is deeper, and what follows, without an error (bs4, fed the parse
    events, saw it all); with it, a page nested too deep for the walk fails with a
    reason instead (tests/test_extract_html.py)."""
    if isinstance(markup, bytes):
        markup = UnicodeDammit(markup, is_html=True).unicode_markup or ""
    parser = etree.HTMLParser(recover=True, huge_tree=True)
    parser.feed(markup)
    return parser.close()


def _element(node) -> bool:
    return isinstance(node.tag, str)  # comments, processing instructions and entities are not


def top_elements(root) -> list:
    """The document's top-level elements: the root, and the further <html> elements
    libxml2 makes for content after </html> (text appended to an exported page)."""
    if root is None:
        return []
    return [root] + [e for e in root.itersiblings() if _element(e)]


def _nodes(el):
    """The children of `el` in document order: its strings and its elements (comments
    and processing instructions leave out their own text, not the text after them)."""
    if el.text:
        yield el.text
    for child in el:
        if _element(child):
            yield child
        if child.tail:
            yield child.tail


def _text(el) -> str:
    """All the text inside `el`, as beautifulsoup4's get_text gives it."""
    out: list[str] = []

    def add(e) -> None:
        if e.tag not in _UNSEEN_TEXT and e.text:
            out.append(e.text)
        for child in e:
            if _element(child):
                add(child)
            if child.tail:
                out.append(child.tail)

    add(el)
    return "".join(out)


def _dropped(tag) -> bool:
    name = tag.tag
    if name in DROP:
        return True
    keys = tag.keys()
    if keys:  # most elements have no attribute: nothing more to look up
        if "hidden" in keys or str(tag.get("aria-hidden", "")).lower() == "true":
            return True
        if _HIDDEN_STYLE.search(str(tag.get("style", ""))):
            return True
        if str(tag.get("role", "")).lower() in DROP_ROLES:
            return True
    if name in ("header", "footer"):
        return not any(p.tag in SECTIONING for p in tag.iterancestors())
    if name == "a" and str(tag.get("href", "")).startswith("#"):
        return _permalink(tag)
    if name in ("p", "table"):
        return _navigation_bar(tag)
    return False


def _navigation_bar(tag) -> bool:
    """A paragraph or table whose every link is a page-to-page navigation link (one
    with a keyboard shortcut, `accesskey`, or a `rel` of the HTML standard's
    sequential and hierarchical link types: next, prev, up, index, ...), at least two
    of them, and little text besides: the Prev / Up / Next bar DocBook and Texinfo put
    above and below every page ("Next: Using libffi, Previous: libffi, Up: libffi
    [Index]"). Only a small element is looked at (NAV_BAR_ELEMENTS), so a long table
    costs nothing and nested tables cannot make the walk quadratic."""
    links = 0
    for k, el in enumerate(tag.iter()):
        if k > NAV_BAR_ELEMENTS:
            return False
        if el.tag == "a" and el.get("href") is not None:
            if el.get("accesskey") is None and not set(str(el.get("rel", "")).lower().split()) & _NAV_RELS:
                return False
            links += 1
    if links < 2:
        return False
    return _text_within(tag, NAV_BAR_CHARS_PER_LINK * links)


def _permalink(tag) -> bool:
    """A link whose text is only permalink signs (a few characters). Read piece by
    piece and given up at the first other character or past PERMALINK_CHARS: an
    unclosed link can hold the rest of the page, and reading all of it for each of
    hundreds of nested links took seconds."""
    n = 0
    for piece in tag.itertext():
        n += len(piece)
        if n > PERMALINK_CHARS or _PERMALINK_SIGNS.sub("", piece):
            return False
    return True


def _text_within(tag, limit: int) -> bool:
    """Whether the element's text, runs of whitespace counted as one, holds at most
    `limit` characters (read only until it is over)."""
    n = 0
    for piece in tag.itertext():
        n += len(" ".join(piece[:limit + 2].split())) + 1  # a prefix: a long piece is over anyway
        if n > limit + 1:
            return False
    return True


def inline_text(node) -> str:
    """The text of an element as one line; block boundaries and <br> become spaces."""
    out: list[str] = []

    def walk(el) -> None:
        for child in _nodes(el):
            if isinstance(child, str):
                out.append(child)
            elif not _dropped(child):
                name = child.tag
                if name == "br" or name in BLOCKISH:
                    out.append(" ")
                walk(child)
                if name in BLOCKISH:
                    out.append(" ")
                if name == "img" and child.get("alt"):
                    out.append(str(child.get("alt")))

    walk(node)
    return inline("".join(out))


def _rows(table) -> list[list[str]] | None:
    """Rows of a data table, or None when the table is layout."""
    if next(table.iterdescendants("table"), None) is not None:
        return None
    head, body, foot = [], [], []
    for tr in table.iterdescendants("tr"):
        section = next((p for p in tr.iterancestors() if p.tag in ("thead", "tfoot", "table")), None)
        row: list[str] = []
        for cell in tr:
            if cell.tag not in ("td", "th"):
                continue
            row.append(inline_text(cell))
            try:
                span = int(str(cell.get("colspan", "1")).strip() or 1)
            except ValueError:
                span = 1
            row.extend([""] * max(0, min(span, 100) - 1))
        target = head if section is not None and section.tag == "thead" else (
            foot if section is not None and section.tag == "tfoot" else body)
        target.append(row)
    rows = head + body + foot
    n_rows, n_cols = table_shape(rows)
    if n_rows < 2 or n_cols < 2:
        return None
    return rows


def _detach(el) -> None:
    """Take `el` out of its parent, leaving the text after it where it was."""
    parent = el.getparent()
    if el.tail:
        before = el.getprevious()
        if before is not None:
            before.tail = (before.tail or "") + el.tail
        else:
            parent.text = (parent.text or "") + el.tail
    parent.remove(el)


class Walker:
    def __init__(self) -> None:
        self.blocks: list = []
        self.buf: list[str] = []

    def flush(self) -> None:
        text = "".join(self.buf)
        self.buf.clear()
        if not text or text.isspace():
            return  # most flushes: a block element's edge with only whitespace before it
        # Collapse whitespace, keeping <br> line breaks (marked "\n") as lines.
        lines = [inline(part) for part in text.split("\n")]
        block = paragraph_block("\n".join(line for line in lines if line))
        if block:
            self.blocks.append(block)

    def emit(self, block) -> None:
        if block:
            self.flush()
            self.blocks.append(block)

    def list_lines(self, node, depth: int, out: list[str]) -> None:
        ordered = node.tag == "ol"
        try:
            number = int(str(node.get("start", "1")).strip() or 1)
        except ValueError:
            number = 1
        for li in [c for c in node if c.tag == "li"]:
            if _dropped(li):
                continue
            nested = [c for c in li if c.tag in LISTS]
            for sub in nested:
                _detach(sub)
            text = inline_text(li)
            marker = f"{number}." if ordered else "-"
            if text:
                out.append("  " * depth + f"{marker} {text}")
            number += 1
            for sub in nested:
                if not _dropped(sub):
                    self.list_lines(sub, depth + 1, out)
        # Stray text directly in the list (invalid, but seen): keep it as a line.
        loose = inline("".join(c for c in _nodes(node) if isinstance(c, str)))
        if loose:
            out.append("  " * depth + loose)

    def walk_document(self, root) -> None:
        """The whole document (root: parse_html's)."""
        for top in top_elements(root):
            self.visit(top)

    def walk(self, node) -> None:
        for child in _nodes(node):
            self.visit(child)

    def visit(self, child) -> None:
        if isinstance(child, str):
            self.buf.append(child.replace("\n", " "))
            return
        if _dropped(child):
            return
        name = child.tag
        if name in HEADINGS:
            self.emit(heading_block(inline_text(child), HEADINGS[name]))
        elif name in LISTS:
            lines: list[str] = []
            self.list_lines(child, 0, lines)
            self.emit(list_block(lines))
        elif name == "pre":
            self.emit(code_block(_text(child)))
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


def first_element(root, name: str):
    """The document's first element named `name`, in document order, or None."""
    return next((e for top in top_elements(root) for e in top.iter(name)), None)


class NestedTooDeep(ValueError):
    """Elements nested deeper than the walk follows (it recurses once per level)."""


def document_blocks(root, within: str | None = None) -> list:
    """The blocks of a parsed document (parse_html's root): the content of its first
    `within` element when it has one (an EPUB chapter's body), else the whole document."""
    walker = Walker()
    part = first_element(root, within) if within else None
    try:
        if part is not None:
            walker.walk(part)
        else:
            walker.walk_document(root)
    except RecursionError:
        # Python's own message ("maximum recursion depth exceeded") says nothing about
        # the page. The walk follows about 490 levels from the extract step (measured).
        raise NestedTooDeep("elements nested too deep to read (hundreds of levels, one inside "
                            "another; pages people write nest a few dozen)") from None
    walker.flush()
    return walker.blocks


def title_text(root) -> str:
    """The text of the document's first <title>, as one line ("" without one)."""
    title = first_element(root, "title")
    return inline(_text(title)) if title is not None else ""


def visible_text(html: str) -> str:
    """The text a reader would see in an HTML fragment, as one line (same drop rules)."""
    return inline(" ".join(b.text for b in document_blocks(parse_html(html))))
