"""The extract step: a source file's bytes in, the document's pages of blocks out.

This module holds the step's contract: its parameters, the guards that apply to every
format (file size, empty files, what sniffing refuses), and the turning of a reader's
`ReadResult` into `Page` units with the payload every page carries.

Which reader reads which sniffed format is the registry's business (registry.py); the
readers import only the helpers (blocks.py and the shared parsers such as html_walk.py),
never this module and never each other. Readers are imported when first needed, so a
text-only run never loads the PDF stack. The block rules are in blocks.py.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any

from pydantic import Field, field_validator

from ..spec import StepContext, StepParams, StepSpec
from ..units import BLOCK_SEP, DOCUMENT_LOCATOR, SKIPPED, TABLE, Block, Page, Source, page_locator
from .blocks import DocumentFailure, DocumentSkipped, ReaderInput, file_stem, first_heading
from .nondocs import KINDS as NONDOC_KINDS
from .nondocs import kind_of as nondoc_kind
from .nondocs import reason as nondoc_reason
from .registry import CONVERTED, METHODS, reader_for
from .sniff import extension, sniff, unprintable_count
from .unpack import COMPRESSED_FORMATS, decompress

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
    "navigation",
    "layer_problem",
    "control_bytes",
    "encoding",
    "byte_size",
    "modified_at",
    "mail_from",
    "mail_to",
    "mail_cc",
    "mail_date",
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
    read_kinds: list[str] = Field(
        default_factory=list,
        description=("kinds of non-documents to read anyway, as text (skipped by default): "
                     + ", ".join(NONDOC_KINDS)),
    )
    @field_validator("read_kinds")
    @classmethod
    def _known_kinds(cls, kinds: list[str]) -> list[str]:
        unknown = [k for k in kinds if k not in NONDOC_KINDS]
        if unknown:
            raise ValueError(f"unknown kind(s) {unknown}; known: {', '.join(NONDOC_KINDS)}")
        return kinds

    slide_notes: bool = Field(
        True, description="read a slide's speaker notes (after the slide, under a heading 'Notes')",
    )
    drop_navigation: bool = Field(
        True,
        description=(
            "drop PDF pages judged to be navigation (contents, index, lists of figures or "
            "tables: column `navigation`) instead of passing them on to be chunked"
        ),
    )
    max_members: int = Field(
        10_000, gt=0, description="an archive or mailbox with more documents inside fails without being unpacked")
    max_unpacked_mb: float = Field(
        500, gt=0,
        description="an archive, mailbox or compressed file that unpacks to more fails (members are held in memory)")
    max_compression_ratio: float = Field(
        100, gt=1,
        description=("an archive or compressed file unpacking to more than this many times its packed size "
                     "(once past 1 MB) fails as a decompression bomb"))
    max_nesting: int = Field(
        3, ge=1, description="archives or e-mails inside more containers than this are not opened")


def payload(blocks: list[Block], method: str, page_count: int, encoding: str,
            source: Source | None = None, columns: int = 1,
            removed: list[dict] | None = None, navigation: str = "") -> dict[str, Any]:
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
        "navigation": navigation,
        "layer_problem": "",  # why a PDF page's text layer was judged unreadable (text_layer.py)
        "control_bytes": 0,  # set on a text file's first page (sniff.STRAY_CONTROL_LIMIT)
        "encoding": encoding,
        "byte_size": size,
        "modified_at": (datetime.fromtimestamp(source.mtime, timezone.utc)
                        if source is not None and source.mtime else None),
        # an e-mail reader fills these (PagePart.fields); other formats leave them null
        "mail_from": None, "mail_to": None, "mail_cc": None, "mail_date": None,
    }




# --- the step -----------------------------------------------------------------

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
        payload=payload([], METHODS.get(fmt, ""), 0, "", source),
    )
    page.fail(reason, exc)
    return [page]


_NAME_DECIDES = ("text", "html", "markdown", "")


def skipped_document(source: Source, reason: str, fmt: str = "") -> list[Page]:
    """The single unit that stands for a file that is not a document to read."""
    page = failed_document(source, reason, fmt=fmt)[0]
    page.skip(reason)
    return [page]


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

    name = source.source_path.replace("\\", "/").rsplit("/", 1)[-1]
    ext = extension(source.source_path)
    found = sniff(data, source.source_path)
    kind = nondoc_kind(name, ext, data[:4096])
    # Bytes that name a document format (a PDF saved as .bin) make it that document; the
    # name decides only for text-like or unreadable content, where it is the best evidence.
    if kind and kind not in params.read_kinds and (found.reason or found.format in _NAME_DECIDES):
        return skipped_document(source, nondoc_reason(kind, ext))
    if found.reason:
        return failed_document(source, found.reason, fmt=found.format)

    # A compressed single file (manual.pdf.gz, minutes.tar.gz) is read as the file
    # inside: same document, the content sniffed again. Layers count towards max_nesting.
    inner_path, layers = source.source_path, 0
    while found.format in COMPRESSED_FORMATS:
        layers += 1
        if layers > params.max_nesting:
            return failed_document(source, f"nested too deep: more than {params.max_nesting} layers of "
                                           "compression (max_nesting)", fmt=found.format)
        try:
            inner = decompress(data, found.format, inner_path, int(params.max_unpacked_mb * MB),
                               params.max_compression_ratio)
        except DocumentFailure as failure:
            return failed_document(source, failure.reason, failure.cause, fmt=found.format)
        data, inner_path = inner.data, inner.name
        inner_ext = extension(inner_path)
        kind = nondoc_kind(inner_path, inner_ext, data[:4096])
        if kind and kind not in params.read_kinds:  # a compressed stylesheet, say
            return skipped_document(source, nondoc_reason(kind, inner_ext) + " (inside the compressed file)")
        if len(data) > params.max_file_mb * MB:
            return failed_document(source, f"file too large: {_mb(len(data) / MB)} MB once decompressed, over "
                                           f"the limit of {params.max_file_mb:g} MB", fmt=found.format)
        found = sniff(data, inner_path)
        if found.reason:
            return failed_document(source, f"{found.reason} (inside the compressed file)", fmt=found.format)

    fmt, read_data, method_prefix = found.format, data, ""
    try:
        if fmt in CONVERTED:
            # .doc/.ppt: LibreOffice writes .docx/.pptx, which the matching reader reads.
            from .office_convert import convert

            # 90 % of the limit: LibreOffice runs in its own process group, which the
            # flows layer's kill at the limit would not reach.
            read_data = convert(data, fmt, 0.9 * params.time_limit_seconds)
            fmt, method_prefix = CONVERTED[fmt], "libreoffice+"
        result = reader_for(fmt)(ReaderInput(read_data, found.text, found.encoding, params, inner_path,
                                                  source.depth))
        if method_prefix:
            result.format, result.method = found.format, method_prefix + result.method
    except DocumentSkipped as skipped:
        return skipped_document(source, skipped.reason, fmt=found.format)
    except DocumentFailure as failure:
        return failed_document(source, failure.reason, failure.cause, fmt=found.format)
    except Exception as exc:  # a parser bug or a file it chokes on: this file only
        return failed_document(
            source,
            f"could not extract {found.format.upper()}: {type(exc).__name__}: {exc}",
            exc,
            fmt=found.format,
        )

    title = result.title.strip() or first_heading(result.pages) or file_stem(inner_path)
    doc_warnings = found.warnings + result.warnings
    if layers:
        doc_warnings = doc_warnings + [f"read as {inner_path}, decompressed from {layers} layer(s)"]
    if not result.pages:  # a container without pages of its own: one unit says what it held
        page = Page(locator=page_locator(None), page=None, blocks=[], title=title, format=result.format,
                    parents=[], payload=payload([], result.method, 0, "", source, removed=result.removed),
                    members=result.members)
        page.status, page.reason = SKIPPED, result.skipped or "no pages"
        page.warnings = doc_warnings
        return [page]
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
                            result.encoding, source, part.columns, part.removed,
                            part.navigation) | part.fields,
            duration_ms=None if part.duration_ms is None else round(part.duration_ms, 3),
        )
        page.warnings = doc_warnings + part.warnings
        if part.failure:
            page.fail(part.failure, part.error)
        elif part.navigation and params.drop_navigation:
            page.drop(f"navigation page ({part.navigation}): its lines are entries with "
                      "page references; set extract drop_navigation: false to keep it")
        pages.append(page)
    pages[0].members = result.members
    pages[0].payload["control_bytes"] = found.control_bytes  # once per file, so sums count bytes
    return pages


def _source_limit(params: ExtractParams) -> int:
    return int(params.max_file_mb * MB)


def _time_limit(params: ExtractParams) -> float:
    return params.time_limit_seconds


EXTRACT = StepSpec(
    name="extract",
    version="7",
    consumes="source",
    produces="pages",
    scope="document",
    params=ExtractParams,
    run=extract,
    source_limit=_source_limit,
    time_limit=_time_limit,
    summary=(
        "Reads a source file (PDF, HTML, Markdown, plain text, Word, OpenDocument, RTF, "
        "EPUB, slide decks, spreadsheets; format sniffed from content) into pages of "
        "heading, paragraph, table and code blocks; archives and e-mails hand documents inside "
        "them back as documents of their own, compressed files are read as the file inside."
    ),
)
