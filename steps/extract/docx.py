"""Word documents (.docx), read with python-docx; the whole file is one page.

Body content in document order:
- Paragraphs in a "Heading N" style are headings of level N (capped at 6); "Title" is
  level 1. A paragraph whose own properties or style chain set an outline level
  (w:outlineLvl, 0-based) is a heading of that level + 1, which also catches
  headings in localised or custom styles.
- Numbered or bulleted paragraphs (a w:numPr on the paragraph or its style chain, or
  a "List ..." style) in a row become one paragraph of "- item" lines, two spaces
  of indent per list level.
- Tables become TABLE blocks; a merged cell's text appears once (the other grid cells
  it covers are empty). A table smaller than 2 x 2 is read as paragraphs.
- Other paragraphs are paragraphs; a manual line break stays a line break.
Page headers and footers, footnotes, comments and text boxes are not read.
The title is the core properties' title, else the first heading.
"""

from __future__ import annotations

import io
import re

import docx
from docx.table import Table
from docx.text.paragraph import Paragraph

from .blocks import (
    ReaderInput,
    DocumentFailure,
    PagePart,
    ReadResult,
    heading_block,
    inline,
    flush_list,
    paragraph_block,
    table_or_paragraphs,
)

_HEADING_STYLE = re.compile(r"^heading\s+(\d+)$", re.IGNORECASE)
_W = "{http://schemas.openxmlformats.org/wordprocessingml/2006/main}"


def _style_chain(style):
    seen = 0
    while style is not None and seen < 20:  # base styles can form a loop in bad files
        yield style
        style = style.base_style
        seen += 1


def _outline_level(paragraph: Paragraph) -> int | None:
    values = paragraph._p.xpath("./w:pPr/w:outlineLvl/@w:val")
    if not values:
        for style in _style_chain(paragraph.style):
            values = style.element.xpath("./w:pPr/w:outlineLvl/@w:val")
            if values:
                break
    if values:
        try:
            level = int(values[0])
        except ValueError:
            return None
        return level + 1 if 0 <= level <= 8 else None  # 9 means body text
    return None


def heading_level(paragraph: Paragraph) -> int | None:
    style = paragraph.style
    name = (style.name or "") if style is not None else ""
    found = _HEADING_STYLE.match(name.strip())
    if found:
        return min(6, max(1, int(found.group(1))))
    if name.strip().lower() == "title":
        return 1
    level = _outline_level(paragraph)
    return min(6, level) if level else None


def list_depth(paragraph: Paragraph) -> int | None:
    """List nesting level (0-based) of a list paragraph, None for other paragraphs."""
    num = paragraph._p.xpath("./w:pPr/w:numPr")
    if num:
        ilvl = num[0].xpath("./w:ilvl/@w:val")
        num_id = num[0].xpath("./w:numId/@w:val")
        if num_id and num_id[0] == "0":
            return None  # numbering explicitly switched off
        return int(ilvl[0]) if ilvl and ilvl[0].isdigit() else 0
    style = paragraph.style
    for st in _style_chain(style):
        if st.element.xpath("./w:pPr/w:numPr"):
            return 0
    name = (style.name or "") if style is not None else ""
    return 0 if name.lower().startswith("list") and name.lower() != "list paragraph" else None


def table_rows(table: Table) -> list[list[str]]:
    rows: list[list[str]] = []
    above: list = []
    for row in table.rows:
        cells = row.cells
        texts: list[str] = []
        tcs: list = []
        for j, cell in enumerate(cells):
            tc = cell._tc
            tcs.append(tc)
            merged_left = j > 0 and tcs[j - 1] is tc
            merged_up = j < len(above) and above[j] is tc
            if merged_left or merged_up:
                texts.append("")
            else:
                texts.append(inline(" ".join(p.text for p in cell.paragraphs)))
        above = tcs
        rows.append(texts)
    return rows


def read_docx(inp: ReaderInput) -> ReadResult:
    data = inp.data
    try:
        document = docx.Document(io.BytesIO(data))
    except Exception as exc:  # python-docx raises several kinds for damaged packages
        raise DocumentFailure(f"unreadable DOCX: {type(exc).__name__}: {exc}", exc) from exc

    blocks = []
    list_lines: list[str] = []

    def end_list() -> None:
        flush_list(blocks, list_lines)

    for item in document.iter_inner_content():
        if isinstance(item, Table):
            end_list()
            blocks.extend(table_or_paragraphs(table_rows(item)))
            continue
        text = item.text
        if not text.strip():
            continue
        level = heading_level(item)
        if level:
            end_list()
            block = heading_block(text, level)
            if block:
                blocks.append(block)
            continue
        depth = list_depth(item)
        if depth is not None:
            list_lines.append("  " * min(depth, 8) + "- " + inline(text))
            continue
        end_list()
        block = paragraph_block(text)
        if block:
            blocks.append(block)
    end_list()

    title = ""
    try:
        title = (document.core_properties.title or "").strip()
    except Exception:  # a damaged core.xml only costs the title
        title = ""
    part = PagePart(page=None, blocks=blocks)
    if not blocks:
        part.warnings.append("no text (the document body is empty)")
    return ReadResult(format="docx", method="docx", pages=[part], title=title)
