"""OpenDocument XML to text: what the .odt and .odp readers share.

Read with lxml straight from content.xml (ODF 1.2/1.3, OASIS), not odfpy: the readers
only walk the tree, lxml is already a dependency and parses C-fast, and odfpy's last
release is from 2020. Paragraph text keeps text:s (runs of spaces), text:tab and
text:line-break; footnotes and endnotes (text:note) are taken out of the running text
and handed back so the reader can place them; annotations (comments) are left out.
"""

from __future__ import annotations

import io
import re
import zipfile

from lxml import etree

from .blocks import DocumentFailure, inline

NS = {
    "office": "urn:oasis:names:tc:opendocument:xmlns:office:1.0",
    "text": "urn:oasis:names:tc:opendocument:xmlns:text:1.0",
    "table": "urn:oasis:names:tc:opendocument:xmlns:table:1.0",
    "draw": "urn:oasis:names:tc:opendocument:xmlns:drawing:1.0",
    "presentation": "urn:oasis:names:tc:opendocument:xmlns:presentation:1.0",
    "style": "urn:oasis:names:tc:opendocument:xmlns:style:1.0",
    "svg": "urn:oasis:names:tc:opendocument:xmlns:svg-compatible:1.0",
    "dc": "http://purl.org/dc/elements/1.1/",
}


def q(name: str) -> str:
    """'text:p' -> '{urn:...text:1.0}p'."""
    prefix, local = name.split(":")
    return f"{{{NS[prefix]}}}{local}"


P, H, S, TAB, BR, NOTE, NOTE_BODY, ANNOTATION = (
    q("text:p"), q("text:h"), q("text:s"), q("text:tab"), q("text:line-break"),
    q("text:note"), q("text:note-body"), q("office:annotation"))
LIST, LIST_ITEM, LIST_HEADER = q("text:list"), q("text:list-item"), q("text:list-header")
TABLE, ROW, CELL, COVERED = (q("table:table"), q("table:table-row"), q("table:table-cell"),
                             q("table:covered-table-cell"))
# Inside a paragraph: comments, note marks (a note is read on its own), and frames
# (pictures, text boxes anchored to the paragraph) are not part of its text.
_SKIP_INLINE = {ANNOTATION, q("text:note-citation"), q("draw:frame"), q("draw:a")}
# A cap on table:number-columns-repeated: a row padded to the sheet's last column
# repeats an empty cell some 16,000 times.
MAX_REPEAT = 256


class Package:
    """An ODF zip: content.xml parsed, and the title from meta.xml."""

    def __init__(self, data: bytes, what: str):
        try:
            with zipfile.ZipFile(io.BytesIO(data)) as archive:
                content = archive.read("content.xml")
                meta = archive.read("meta.xml") if "meta.xml" in archive.namelist() else b""
        except KeyError as exc:
            raise DocumentFailure(f"unreadable {what}: no content.xml in the package", exc) from exc
        except (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError) as exc:
            raise DocumentFailure(f"unreadable {what}: {type(exc).__name__}: {exc}", exc) from exc
        parser = etree.XMLParser(resolve_entities=False, no_network=True, huge_tree=True)
        try:
            self.root = etree.fromstring(content, parser)
        except etree.XMLSyntaxError as exc:
            raise DocumentFailure(f"unreadable {what}: content.xml is not well-formed XML: {exc}",
                                  exc) from exc
        self.title = ""
        if meta:
            try:
                found = etree.fromstring(meta, parser).find(".//dc:title", NS)
                self.title = inline(found.text or "") if found is not None else ""
            except etree.XMLSyntaxError:
                self.title = ""  # a damaged meta.xml only costs the title


def paragraph_text(element, notes: list[str] | None = None) -> str:
    """The text of a text:p or text:h (spans, links, spaces, tabs, line breaks)."""
    parts: list[str] = []

    def walk(node) -> None:
        if node.text:
            parts.append(node.text)
        for child in node:
            tag = child.tag
            if tag == S:
                parts.append(" " * int(child.get(q("text:c"), "1") or 1))
            elif tag == TAB:
                parts.append("\t")
            elif tag == BR:
                parts.append("\n")
            elif tag == NOTE:
                if notes is not None:
                    body = child.find(NOTE_BODY)
                    if body is not None:
                        text = " ".join(inline(paragraph_text(p)) for p in body.iter(P, H))
                        citation = child.find(q("text:note-citation"))
                        mark = inline(citation.text or "") if citation is not None else ""
                        notes.append(f"[{mark}] {text}" if mark else text)
            elif tag in _SKIP_INLINE or not isinstance(tag, str):
                pass
            else:
                walk(child)
            if child.tail:
                parts.append(child.tail)

    walk(element)
    return "".join(parts)


def list_lines(element, depth: int = 0, notes: list[str] | None = None) -> list[str]:
    """A text:list as "- item" lines, two spaces of indent per level."""
    lines: list[str] = []
    for item in element:
        if item.tag not in (LIST_ITEM, LIST_HEADER):
            continue
        for child in item:
            if child.tag in (P, H):
                text = inline(paragraph_text(child, notes))
                if text:
                    lines.append("  " * min(depth, 8) + "- " + text)
            elif child.tag == LIST:
                lines.extend(list_lines(child, depth + 1, notes))
    return lines


def _cell_text(cell, notes: list[str] | None) -> str:
    texts = []
    for node in cell.iter(P, H):
        texts.append(inline(paragraph_text(node, notes)))
    return " ".join(t for t in texts if t)


def table_rows(table, notes: list[str] | None = None) -> list[list[str]]:
    """A table:table's rows of cell texts; covered (merged) cells are empty."""
    rows: list[list[str]] = []
    for row in table.iter(ROW):
        if row.getparent() is not None and _owner_table(row) is not table:
            continue  # a row of a table nested in a cell
        repeat_rows = min(int(row.get(q("table:number-rows-repeated"), "1") or 1), MAX_REPEAT)
        cells: list[str] = []
        for cell in row:
            if cell.tag not in (CELL, COVERED):
                continue
            repeat = min(int(cell.get(q("table:number-columns-repeated"), "1") or 1), MAX_REPEAT)
            text = _cell_text(cell, notes) if cell.tag == CELL else ""
            cells.extend([text] * repeat)
        while cells and not cells[-1]:
            cells.pop()
        if any(cells):
            rows.extend([cells] * repeat_rows)
    return rows


def _owner_table(row):
    node = row.getparent()
    while node is not None and node.tag != TABLE:
        node = node.getparent()
    return node


_LENGTH = re.compile(r"^\s*(-?[\d.]+)\s*(cm|mm|in|pt|pc|px)?\s*$")
_TO_CM = {"cm": 1.0, "mm": 0.1, "in": 2.54, "pt": 2.54 / 72, "pc": 2.54 / 6, "px": 2.54 / 96,
          None: 1.0}


def length_cm(value: str | None) -> float:
    """An ODF length ("2.5cm", "1in") in centimetres; 0 when missing or malformed."""
    found = _LENGTH.match(value or "")
    if not found:
        return 0.0
    try:
        return float(found.group(1)) * _TO_CM[found.group(2)]
    except ValueError:
        return 0.0
