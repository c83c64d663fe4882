"""OpenDocument text (.odt, .ott), read from content.xml; the whole file is one page.

Body content in document order (office:text, sections and their contents included):
- text:h is a heading of its text:outline-level (1 when missing; capped at 6).
- text:list becomes one paragraph of "- item" lines, two spaces of indent per level.
- table:table becomes a TABLE block (covered cells of a merge are empty); a table
  smaller than 2 x 2 is read as paragraphs.
- Footnotes and endnotes (text:note) leave the running text and follow at the end of
  their section, before the next heading (and at the end of the document), as
  paragraphs "[1] note text".
- A table of contents or other index (text:table-of-content, text:*-index) is left out
  and listed in `removed`: it repeats the headings.
- Frames, drawings, images and annotations (comments) are not read.
The title is meta.xml's dc:title, else the first heading.
"""

from __future__ import annotations

from .blocks import (
    PagePart,
    ReaderInput,
    ReadResult,
    flush_list,
    heading_block,
    inline,
    paragraph_block,
    table_or_paragraphs,
)
from .odf_text import H, LIST, P, TABLE, Package, list_lines, paragraph_text, q, table_rows

_INDEXES = {q(f"text:{name}") for name in (
    "table-of-content", "illustration-index", "table-index", "object-index",
    "user-index", "alphabetical-index", "bibliography")}
_CONTAINERS = {q("text:section"), q("text:index-body")}


def read_odt(inp: ReaderInput) -> ReadResult:
    package = Package(inp.data, "OpenDocument text")
    body = package.root.find(q("office:body"))
    text = body.find(q("office:text")) if body is not None else None
    blocks: list = []
    notes: list[str] = []
    removed: list[dict] = []
    list_items: list[str] = []

    def flush_notes() -> None:
        for note in notes:
            block = paragraph_block(inline(note))
            if block:
                blocks.append(block)
        notes.clear()

    def walk(parent) -> None:
        for node in parent:
            tag = node.tag
            if tag == H:
                flush_list(blocks, list_items)
                flush_notes()
                try:
                    level = int(node.get(q("text:outline-level"), "1") or 1)
                except ValueError:
                    level = 1
                block = heading_block(paragraph_text(node, notes), level)
                if block:
                    blocks.append(block)
            elif tag == P:
                flush_list(blocks, list_items)
                block = paragraph_block(paragraph_text(node, notes))
                if block:
                    blocks.append(block)
            elif tag == LIST:
                list_items.extend(list_lines(node, 0, notes))
            elif tag == TABLE:
                flush_list(blocks, list_items)
                blocks.extend(table_or_paragraphs(table_rows(node, notes)))
            elif tag in _INDEXES:
                flush_list(blocks, list_items)
                words = inline(" ".join(paragraph_text(p) for p in node.iter(P)))
                removed.append({"kind": "index", "text": words[:200],
                                "reason": "a table of contents or index repeats the headings"})
            elif tag in _CONTAINERS:
                walk(node)

    if text is not None:
        walk(text)
    flush_list(blocks, list_items)
    flush_notes()
    part = PagePart(page=None, blocks=blocks, removed=removed)
    if not blocks:
        part.warnings.append("no text (the document body is empty)")
    return ReadResult(format="odt", method="odt", pages=[part], title=package.title)
