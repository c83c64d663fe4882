"""What slide readers share: reading order of shapes and the blocks of one slide.

A slide reader (pptx.py, odp.py) turns each shape into a `Shape` (its position and
what it holds); `slide_blocks` then orders them and makes the page's blocks:
- the title placeholder first, as a level-1 heading;
- then the other shapes top to bottom, then left to right (by their top edge, then
  left edge); a group is placed by its own box and its members are ordered the same
  way inside it, so a group's text stays together;
- text as paragraphs (bulleted outline levels as "- item" lines), tables as tables;
- the speaker notes last, under a level-2 heading "Notes" so that every chunk of
  them carries "Notes" in its heading path (switched off by `slide_notes`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from .blocks import flush_list, heading_block, inline, paragraph_block, table_block, table_shape

NOTES_HEADING = "Notes"


@dataclass
class Shape:
    top: float
    left: float
    title: bool = False
    # Paragraphs as (text, list level or None when not a list item).
    paragraphs: list[tuple[str, int | None]] = field(default_factory=list)
    table: list[list[str]] | None = None
    members: list["Shape"] = field(default_factory=list)  # a group's shapes


def _ordered(shapes: list[Shape]) -> list[Shape]:
    out: list[Shape] = []
    for shape in sorted(shapes, key=lambda s: (s.top, s.left)):
        if shape.members:
            out.extend(_ordered(shape.members))
        else:
            out.append(shape)
    return out


def _text_blocks(paragraphs: list[tuple[str, int | None]]) -> list:
    blocks: list = []
    items: list[str] = []
    for text, level in paragraphs:
        text = inline(text)
        if not text:
            continue
        if level is not None:
            items.append("  " * min(level, 8) + "- " + text)
            continue
        flush_list(blocks, items)
        block = paragraph_block(text)
        if block:
            blocks.append(block)
    flush_list(blocks, items)
    return blocks


def slide_blocks(shapes: list[Shape], notes: list[str] | None) -> list:
    titles = [s for s in shapes if s.title]
    rest = [s for s in shapes if not s.title]
    blocks: list = []
    for shape in sorted(titles, key=lambda s: (s.top, s.left))[:1]:
        block = heading_block(" ".join(t for t, _ in shape.paragraphs), 1)
        if block:
            blocks.append(block)
    # A second title placeholder (rare) is read as text.
    rest = sorted(titles, key=lambda s: (s.top, s.left))[1:] + rest
    for shape in _ordered(rest):
        if shape.table is not None:
            rows, cols = table_shape(shape.table)
            if rows >= 2 and cols >= 2:
                block = table_block(shape.table)
                if block:
                    blocks.append(block)
            else:
                blocks.extend(_text_blocks([(" ".join(c for c in row if c), None)
                                            for row in shape.table]))
            continue
        blocks.extend(_text_blocks(shape.paragraphs))
    note_blocks = _text_blocks([(n, None) for n in notes or []])
    if note_blocks:
        blocks.append(heading_block(NOTES_HEADING, 2))
        blocks.extend(note_blocks)
    return blocks
