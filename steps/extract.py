"""The extract step: a source file's bytes in, the document's pages of blocks out.

This module holds the step's contract: its parameters, the guards that apply to every
format, the dispatch to a per-format reader, and the helpers that make blocks obey the
block rules (no block separator inside a block; tables and code in one fixed shape).

Per-format readers (extract_pdf, extract_html, ...) return a `ReadResult`; this module
turns it into `Page` units with the payload every page carries. Readers are imported
when first needed: they import the helpers below, and a text-only run never loads the
PDF stack.

Block rules (one place for them):
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
from datetime import datetime, timezone
from typing import Any

from pydantic import Field

from .sniff import sniff, unprintable_count
from .spec import StepContext, StepParams, StepSpec
from .units import (
    BLOCK_SEP,
    CODE,
    DOCUMENT_LOCATOR,
    HEADING,
    PARAGRAPH,
    TABLE,
    Block,
    Page,
    Source,
    page_locator,
)

# Bytes in a megabyte for the file-size guard (SI megabyte, as file managers show it).
MB = 1_000_000

PAYLOAD_KEYS = (
    "method",
    "page_count",
    "char_count",
    "word_count",
    "unprintable_share",
    "table_share",
    "table_count",
    "columns",
    "removed",
    "encoding",
    "byte_size",
    "modified_at",
)


class ExtractParams(StepParams):
    """Parameters of the extract step."""

    max_file_mb: float = Field(200, gt=0, description="larger files fail without being parsed")
    max_pages: int = Field(2000, gt=0, description="PDFs with more pages fail without being parsed")
    time_limit_seconds: float = Field(
        120, gt=0,
        description="a document whose extraction takes longer is stopped (its parser process is killed)",
    )
    pdf_heading_ratio: float = Field(
        1.15,
        ge=1.0,
        description=(
            "a PDF line is a heading when its font size is at least this ratio of the "
            "page's body size (or it is bold, at body size or larger, and short)"
        ),
    )
    ocr: bool = Field(
        False,
        description="read PDF pages without a text layer with Tesseract (it must be installed)",
    )
    ocr_language: str = Field(
        "eng",
        pattern=r"^[A-Za-z0-9_]+(\+[A-Za-z0-9_]+)*$",
        description="Tesseract language(s), joined by '+' (e.g. eng+deu)",
    )
    ocr_dpi: int = Field(300, ge=72, le=600, description="resolution pages are rendered at for OCR")


class DocumentFailure(Exception):
    """A reader's signal that the whole document cannot be extracted, with the reason."""

    def __init__(self, reason: str, cause: BaseException | None = None):
        super().__init__(reason)
        self.reason = reason
        self.cause = cause


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


# --- payload ------------------------------------------------------------------

def payload(blocks: list[Block], method: str, page_count: int, encoding: str,
            source: Source | None = None, columns: int = 1,
            removed: list[dict] | None = None) -> dict[str, Any]:
    text = BLOCK_SEP.join(b.text for b in blocks)
    chars = len(text)
    table_chars = sum(len(b.text) for b in blocks if b.kind == TABLE)
    size = max(source.size, len(source.data)) if source is not None else None
    return {
        "method": method,
        "page_count": int(page_count),
        "char_count": chars,
        # Whitespace-separated words (common practice; scripts without spaces count low).
        "word_count": len(text.split()),
        "unprintable_share": unprintable_count(text) / chars if chars else 0.0,
        "table_share": table_chars / chars if chars else 0.0,
        "table_count": sum(1 for b in blocks if b.kind == TABLE),
        "columns": int(columns),
        "removed": [dict(r) for r in (removed or [])],
        "encoding": encoding,
        "byte_size": size,
        "modified_at": (datetime.fromtimestamp(source.mtime, timezone.utc)
                        if source is not None and source.mtime else None),
    }


# --- the step -----------------------------------------------------------------

_METHODS = {
    "pdf": "text-layer",
    "html": "html",
    "markdown": "markdown",
    "text": "plain",
    "docx": "docx",
}


def failed_document(
    source: Source, reason: str, exc: BaseException | None = None, fmt: str = ""
) -> list[Page]:
    """The single unit that stands for a document that could not be split into pages."""
    page = Page(
        locator=DOCUMENT_LOCATOR,
        page=None,
        blocks=[],
        title=file_stem(source.source_path),
        format=fmt,
        parents=[],
        payload=payload([], _METHODS.get(fmt, ""), 0, "", source),
    )
    page.fail(reason, exc)
    return [page]


def _read(fmt: str, data: bytes, text: str | None, encoding: str,
          params: ExtractParams) -> ReadResult:
    # Imported here: each reader imports this module's helpers, and only the
    # libraries a document needs get loaded.
    if fmt == "pdf":
        from .extract_pdf import read_pdf

        return read_pdf(data, params)
    if fmt == "docx":
        from .extract_docx import read_docx

        return read_docx(data)
    if fmt == "html":
        from .extract_html import read_html

        return read_html(text or "", encoding)
    if fmt == "markdown":
        from .extract_markdown import read_markdown

        return read_markdown(text or "", encoding)
    if fmt == "text":
        from .extract_text import read_text

        return read_text(text or "", encoding)
    raise DocumentFailure(f"unsupported format: {fmt}")


def _mb(value: float) -> str:
    return f"{value:.1f}" if value >= 0.1 else f"{value:.2g}"


def extract(source: Source, params: ExtractParams, ctx: StepContext) -> list[Page]:
    """Read one source file into pages; bad input gives a failed unit, never an exception."""
    data = source.data
    # The size comes from the file system: the flows layer does not read a file over
    # the limit (see source_limit below), so `data` may then be empty.
    size = max(source.size, len(data))
    if size > params.max_file_mb * MB:
        return failed_document(
            source,
            f"file too large: {_mb(size / MB)} MB over the limit of "
            f"{params.max_file_mb:g} MB",
        )
    if len(data) == 0:
        return failed_document(source, "empty file (0 bytes)")

    found = sniff(data, source.source_path)
    if found.reason:
        return failed_document(source, found.reason, fmt=found.format)

    try:
        result = _read(found.format, data, found.text, found.encoding, params)
    except DocumentFailure as failure:
        return failed_document(source, failure.reason, failure.cause, fmt=found.format)
    except Exception as exc:  # a parser bug or a file it chokes on: this file only
        return failed_document(
            source,
            f"could not extract {found.format.upper()}: {type(exc).__name__}: {exc}",
            exc,
            fmt=found.format,
        )

    title = result.title.strip() or first_heading(result.pages) or file_stem(source.source_path)
    doc_warnings = found.warnings + result.warnings
    pages: list[Page] = []
    for part in result.pages:
        page = Page(
            locator=page_locator(part.page),
            page=part.page,
            blocks=part.blocks,
            title=title,
            format=result.format,
            parents=[],
            payload=payload(part.blocks, part.method or result.method, result.page_count,
                            result.encoding, source, part.columns, part.removed),
        )
        page.warnings = doc_warnings + part.warnings
        if part.failure:
            page.fail(part.failure, part.error)
        pages.append(page)
    return pages


def _source_limit(params: ExtractParams) -> int:
    return int(params.max_file_mb * MB)


def _time_limit(params: ExtractParams) -> float:
    return params.time_limit_seconds


EXTRACT = StepSpec(
    name="extract",
    version="2",
    consumes="source",
    produces="pages",
    scope="document",
    params=ExtractParams,
    run=extract,
    source_limit=_source_limit,
    time_limit=_time_limit,
    summary=(
        "Reads a source file (PDF, HTML, Markdown, plain text, DOCX; format sniffed from "
        "content) into pages of heading, paragraph, table and code blocks."
    ),
)
