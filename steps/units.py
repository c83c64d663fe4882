"""The units that flow between steps: source documents, pages and chunks.

Steps see only these plain dataclasses. The flows layer turns them into stage-table
rows (see thresher.flows.schema) and back; it also derives unit ids from `locator`
and lineage from `parents`, so a step never has to know about ids or the store.
"""

from __future__ import annotations

import traceback as _traceback
from dataclasses import dataclass, field
from typing import Any

# Unit outcomes, as the stage tables record them.
OK = "ok"
FAILED = "failed"
DROPPED = "dropped"
SKIPPED = "skipped"
STATUSES = (OK, FAILED, DROPPED, SKIPPED)

# Block kinds extraction may produce. Headings carry their rank (1 = top) in `level`.
HEADING = "heading"
PARAGRAPH = "paragraph"
TABLE = "table"
CODE = "code"
BLOCK_KINDS = (HEADING, PARAGRAPH, TABLE, CODE)

# Separator between blocks in a page's text. Char offsets everywhere assume it.
BLOCK_SEP = "\n\n"

# Locator of the single unit that stands for a whole document when the document
# fails before it could be split into pages (unreadable, too large, password...).
DOCUMENT_LOCATOR = "document"


@dataclass
class Block:
    """One structural piece of a page: a heading, a paragraph, a table or code.

    `language`/`language_prob` are set by the language step: the block's own detected
    language ("unknown" when unsure) and its probability, or None when the block was
    not judged (too short, or code). The split step derives a chunk's language from them.
    """

    kind: str
    text: str
    level: int = 0
    language: str | None = None
    language_prob: float | None = None


@dataclass
class Source:
    """One source file, with its bytes handed in by the flows layer.

    `depth` counts the containers around it: 0 for a file of the drive, 1 for a member
    of an archive on the drive, and so on (the nesting guard reads it).
    """

    doc_id: str
    source_path: str
    data: bytes
    size: int
    mtime: float
    depth: int = 0


def spelled(name: str) -> str:
    """A name as it can be stored and printed: the bytes of it that are not UTF-8, which
    Python carries as lone surrogates (a file system's names, a tar's member names) and
    no Parquet string takes, spelled \\xNN."""
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:
        return name.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    return name


# Control characters as Python writes them in a string literal (\n, \r, \t, \x07).
_CONTROL = {c: repr(chr(c))[1:-1] for c in (*range(32), 127)}


def shown(name: str) -> str:
    """A name as one line of a terminal shows it: its control characters escaped. A
    macOS folder's icon file is "Icon\r", whose carriage return would send the rest of
    a line back over its start; a line break would split one entry in two."""
    return name.translate(_CONTROL)


@dataclass
class Member:
    """A document inside a document (an archive member, an e-mail's attachment or an
    mbox's message), handed back by extraction for the flows layer to read as a
    document of its own. `name` is its path under the container's path
    (`march/minutes.docx`, `attachments/1-budget.xlsx`); it is never stored as a unit."""

    name: str
    data: bytes
    mtime: float | None = None


@dataclass
class Outcome:
    """Status fields shared by pages and chunks."""

    status: str = OK
    reason: str = ""
    error_type: str = ""
    traceback: str = ""
    warnings: list[str] = field(default_factory=list)
    # This unit's own time in the step that made it, when that step measured each unit
    # separately (a PDF page's own read); None when only the whole document was timed.
    duration_ms: float | None = None

    def fail(self, reason: str, exc: BaseException | None = None) -> None:
        """Mark this unit failed; keep the exception's type and traceback if given."""
        self.status = FAILED
        self.reason = reason
        if exc is not None:
            self.error_type = type(exc).__name__
            self.traceback = "".join(
                _traceback.format_exception(type(exc), exc, exc.__traceback__)
            )

    def drop(self, reason: str) -> None:
        self.status = DROPPED
        self.reason = reason

    def skip(self, reason: str) -> None:
        """Not read on purpose (not a document): counted apart from failures."""
        self.status = SKIPPED
        self.reason = reason

    @property
    def ok(self) -> bool:
        return self.status == OK


@dataclass
class Page(Outcome):
    """A page of a document (a PDF page; the whole file for formats without pages).

    `page` is 1-based and None for formats without pages. `locator` names the page
    within its document ("page/3", "file"); `parents` names the locators of the units
    of the previous stage it came from (empty for extraction).
    `payload` holds the producing step's own columns (see flows.schema.STAGE_PAYLOAD).
    """

    locator: str = ""
    page: int | None = None
    blocks: list[Block] = field(default_factory=list)
    title: str = ""
    format: str = ""
    language: str | None = None
    language_prob: float | None = None
    parents: list[str] = field(default_factory=list)
    payload: dict[str, Any] = field(default_factory=dict)
    # Documents inside this one (extraction sets it on a document's first unit); the
    # flows layer reads them as documents of their own and does not store this field.
    members: list[Member] = field(default_factory=list)

    @property
    def text(self) -> str:
        return BLOCK_SEP.join(b.text for b in self.blocks)


@dataclass
class Chunk(Outcome):
    """A piece of a document's text bounded by a token budget.

    Spans: `page_start`/`page_end` are the pages the chunk starts and ends on (None
    for formats without pages); `char_start` is an offset into the cleaned text of
    the start page and `char_end` an exclusive offset into the cleaned text of the
    end page. `chunk_id` is assigned by the flows layer (the split stage's unit id)
    and stays with the chunk through later stages.
    """

    locator: str = ""
    index: int = 0
    text: str = ""
    heading_path: list[str] = field(default_factory=list)
    page_start: int | None = None
    page_end: int | None = None
    char_start: int = 0
    char_end: int = 0
    title: str = ""
    format: str = ""
    language: str | None = None
    language_prob: float | None = None
    # The exact encode_ordinary count of `text` in `encoding` (split sets it), or None
    # once a step changed the text (see clear_stale_count); tokens counts again then.
    token_count: int | None = None
    encoding: str | None = None
    # Leading characters of `text` that are not in the span: a table piece repeats its
    # header row there. `text[prefix_chars:]` is exactly the span's text.
    prefix_chars: int = 0
    chunk_id: str = ""
    parents: list[str] = field(default_factory=list)
    payload: dict[str, Any] = field(default_factory=dict)


@dataclass
class DocChunks:
    """A document's chunks as a corpus-wide step sees them.

    `rank` orders documents for deterministic choices (lower wins): the flows layer
    sets it from when the document was first seen, then its path. `modified` is when
    the file at source_path was last modified (ns since the epoch; 0 when unknown).
    """

    doc_id: str
    source_path: str
    rank: int
    chunks: list[Chunk]
    modified: int = 0


@dataclass
class DocPages:
    """A document's pages as a corpus-wide page step sees them (see DocChunks)."""

    doc_id: str
    source_path: str
    rank: int
    pages: list[Page]


def clear_stale_count(before: Chunk | None, after: Chunk) -> None:
    """Clear `after`'s token count when a step changed the text of the chunk it came
    from (`before`) and carried the old count over, so no count outlives its text."""
    if (before is not None and after.token_count is not None
            and after.token_count == before.token_count and after.encoding == before.encoding
            and after.text is not before.text and after.text != before.text):
        after.token_count = None
        after.encoding = None


def chunk_locator(index: int) -> str:
    return f"chunk/{index:05d}"


def page_locator(page: int | None) -> str:
    return "file" if page is None else f"page/{page}"
