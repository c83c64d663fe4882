"""Helpers every format reader uses: the reader's result types, and the functions that
make blocks obey the block rules (one place for them).

Block rules:
- No block text contains BLOCK_SEP ("\n\n"); a page's text is its blocks joined by it.
- PARAGRAPH: whitespace collapsed inside lines (plain text keeps its spacing); single
  newlines kept only where the source has a hard line structure (plain-text lines,
  list items "- item").
- HEADING: one line, whitespace collapsed; level 1..6.
- TABLE: rows joined by "\n", cells by " | ", header row first; a cell's own line
  breaks become spaces; rows and columns that are empty everywhere are dropped.
- CODE: lines kept as they are (tabs, indentation, trailing spaces). Leading and
  trailing empty lines are removed; an empty line inside the code becomes a line holding
  one space, so line numbers survive and the block separator cannot appear.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from ..units import CODE, HEADING, PARAGRAPH, TABLE, Block, Member

if TYPE_CHECKING:
    from .step import ExtractParams


@dataclass
class ReaderInput:
    """What the step hands a format reader: the file's bytes, its decoded text (for text
    formats, as sniffing decoded it), the encoding, the step's parameters and the path;
    `depth` is how many containers the document sits in (0: a file of the drive)."""

    data: bytes
    text: str | None
    encoding: str
    params: "ExtractParams"
    source_path: str = ""
    depth: int = 0


class DocumentFailure(Exception):
    """A reader's signal that the whole document cannot be extracted, with the reason."""

    def __init__(self, reason: str, cause: BaseException | None = None):
        super().__init__(reason)
        self.reason = reason
        self.cause = cause


class DocumentSkipped(Exception):
    """A reader's signal that the file is not a document to read (an image without
    OCR): the unit is `skipped` with the reason, not `failed`."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


@dataclass
class PagePart:
    """One page as a reader produced it (or the reason it could not)."""

    page: int | None
    blocks: list[Block] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    failure: str = ""
    error: BaseException | None = None
    method: str = ""  # how this page's text was read, when not the reader's usual way
    columns: int = 1
    # What was taken out of the page's text and why: {"kind", "text", "reason"} each.
    removed: list[dict] = field(default_factory=list)
    # A navigation page's kind ("contents", "index", "figures", "tables"), else "".
    navigation: str = ""
    duration_ms: float | None = None  # the page's own read time, when measured per page
    # Values for the extract table's format-specific columns (an e-mail's mail_from...).
    fields: dict = field(default_factory=dict)


@dataclass
class ReadResult:
    """What a format reader returns for a document it could open."""

    format: str
    method: str
    pages: list[PagePart]
    title: str = ""
    encoding: str = ""
    page_count: int = 1
    warnings: list[str] = field(default_factory=list)
    # Documents inside this one (archive members, attachments), read as documents of
    # their own by the flows layer.
    members: list[Member] = field(default_factory=list)
    # A container that gives no pages of its own (an archive) says why here; its one
    # unit is then `skipped` with this reason, and `removed` lists what it left out.
    skipped: str = ""
    removed: list[dict] = field(default_factory=list)


# --- block helpers ---------------------------------------------------------------

_WS = re.compile(r"\s+")
_SPACES = re.compile(r"[^\S\n]+")


def inline(text: str) -> str:
    """Collapse every whitespace run (line breaks included) to one space."""
    return _WS.sub(" ", text).strip()


def heading_block(text: str, level: int) -> Block | None:
    text = inline(text)
    if not text:
        return None
    return Block(HEADING, text, max(1, min(6, int(level))))


def paragraph_block(text: str, keep_spacing: bool = False) -> Block | None:
    """A paragraph keeping its single line breaks; blank lines are removed.

    Space runs collapse too, unless `keep_spacing` (plain text, where indentation and
    aligned columns carry meaning): then lines only lose trailing whitespace.
    """
    if keep_spacing:
        lines = [line.rstrip() for line in text.split("\n")]
    else:
        lines = [_SPACES.sub(" ", line).strip() for line in text.split("\n")]
    text = "\n".join(line for line in lines if line)
    return Block(PARAGRAPH, text) if text else None


def list_block(lines: list[str]) -> Block | None:
    """A list as one paragraph: item lines as given ("  - item"), indentation kept."""
    kept = [line.rstrip() for line in lines if line.strip()]
    return Block(PARAGRAPH, "\n".join(kept)) if kept else None


def flush_list(blocks: list[Block], lines: list[str]) -> None:
    """Close a list being collected: its lines become one block, and `lines` is emptied."""
    if lines:
        block = list_block(lines)
        if block:
            blocks.append(block)
        lines.clear()


def table_block(rows: list[list[str | None]]) -> Block | None:
    """A table from rows of cells (header row first); None when nothing is left."""
    cells = [[inline(c or "") for c in row] for row in rows]
    cells = [row for row in cells if any(row)]
    if not cells:
        return None
    width = max(len(row) for row in cells)
    cells = [row + [""] * (width - len(row)) for row in cells]
    keep = [j for j in range(width) if any(row[j] for row in cells)]
    text = "\n".join(" | ".join(row[j] for j in keep) for row in cells)
    return Block(TABLE, text)


def table_shape(rows: list[list[str | None]]) -> tuple[int, int]:
    """(rows, columns) that hold any text: a grid needs at least 2 x 2 to be a table."""
    cells = [[inline(c or "") for c in row] for row in rows]
    cells = [row for row in cells if any(row)]
    if not cells:
        return 0, 0
    width = max(len(row) for row in cells)
    cols = sum(1 for j in range(width) if any(j < len(row) and row[j] for row in cells))
    return len(cells), cols


def table_or_paragraphs(rows: list[list[str | None]]) -> list[Block]:
    """A grid of at least 2 x 2 cells with text as one table block; a smaller one (a
    layout table, a single row or column) as one paragraph per row."""
    n_rows, n_cols = table_shape(rows)
    if n_rows >= 2 and n_cols >= 2:
        block = table_block(rows)
        return [block] if block else []
    return [b for b in (paragraph_block(" ".join(c for c in row if c)) for row in rows) if b]


def code_block(text: str) -> Block | None:
    lines = text.split("\n")
    while lines and not lines[0].strip():
        lines.pop(0)
    while lines and not lines[-1].strip():
        lines.pop()
    if not lines:
        return None
    return Block(CODE, "\n".join(line if line else " " for line in lines))


def first_heading(pages: list[PagePart]) -> str:
    for part in pages:
        for block in part.blocks:
            if block.kind == HEADING:
                return block.text
    return ""


def file_stem(source_path: str) -> str:
    name = re.split(r"[\\/]", source_path)[-1]
    stem, dot, _ext = name.rpartition(".")
    return stem if dot and stem else name
