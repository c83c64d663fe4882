"""PDF pages: PDFium for the text layer and ruled tables, Tesseract for scans.

Which library does what, and why (measured in bench/extract.py on the PDFs Debian
documentation packages ship):
- PDFium (pypdfium2) opens the file (passwords, page count, metadata, outline) and
  reads every page's characters with their boxes and fonts (pdf_text). It is about
  twenty times faster than pdfminer and agrees with poppler's pdftotext at least as
  well once words are broken at our gap rule.
- Ruled tables come from the same page's ruling lines (PDFium path objects) and words,
  by pdfplumber's "lines" method re-done on them (pdf_grid; same tables as pdfplumber's
  on real ruled pages, tests/test_pdf_grid.py), only on pages whose paths could draw a
  grid. pdfplumber's own finder (pdf_tables) took about 60 % of extraction time on a
  real run, 350 ms per ruled page of the Debian FAQ. A table's characters leave the
  running text.
- When PDFium cannot open a file at all, pdfplumber (pdfminer) reads it instead, with
  the same layout rules and its own table finder, and a warning says so.
- Tesseract reads pages without a text layer when OCR is enabled (pdf_ocr).

Two passes. The first reads each page on its own (a page that fails is recorded and
the others go on): its words, its tables, and its lines (pdf_layout.make_lines). The
second sees the whole document: running headers, footers and page numbers are removed
(pdf_layout.drop_running_lines, each removal recorded in the page's `removed`), then
each page's columns are found and its lines put in reading order
(pdf_layout.find_gutters, order_columns), then headings are classified, then
paragraphs are built with the document's vocabulary deciding hyphenated line ends
(pdf_layout.join_lines).

Headings. The body size of a page is the font size that most of its characters have
(rounded to 0.5 pt); a page with fewer than 200 characters uses the document's body
size instead, so a title page is judged against the text that follows. A line is a
heading when it has a letter, at most 20 words, and either
  - its size is at least `pdf_heading_ratio` times the body size, or
  - it is bold (80 % of its characters in a bold face), at least body size, at most
    12 words, and does not end like a sentence or a run-in label (. , ; :),
    unless the page's body text is itself bold.
Consecutive heading lines of the same style in one column, each starting at most
1.7 font sizes or 1.15 line-box heights below the one before (heading boxes overlap,
so the tops are compared), are one wrapped heading; a hyphen at a line end is joined
by the body rule. A chapter label line ("Chapter 4", "Appendix B") joins the heading
below it ("Chapter 4. Compatibility issues").
Levels: when the PDF has an outline (bookmarks), a heading whose text matches an
outline entry on the same page (case, spacing and punctuation ignored; a leading
section number may differ) takes that entry's depth; an outline entry that no
heading matched promotes the body line with that text on its page, or joins the run
of up to four wrapped lines whose text together is the title. The outline is the
authority for the text too where the page's looks damaged or lost a hyphen
(`_outline_text`). Headings of a
style that matched no entry take the level most entries of that style had; failing
that, levels rank the heading styles of the document by size (bold first on a tie).

Paragraphs. Body lines in reading order join with spaces. A new paragraph starts
after a heading or a table, when the font size changes by more than 1 pt, when the
gap above a line (in the same column) exceeds the page's usual line gap by 0.4 line
heights, or when a line starts 0.8 to 8 em right of the line above, measured from
its column's usual left edge (a first-line indent, as books and Texinfo manuals mark
paragraphs; not under a list item, whose wrapped lines hang indented). A paragraph
that runs to the foot of a column goes on at the head of the next unless the new
column's first line is indented. A line starting with a bullet glyph starts a new
"- item" line. Table-of-contents lines (dot leaders and a page number) are never
headings.

Words. A gap wider than 0.1 of the font size between two characters is a word break.
pdfplumber's default (a fixed 3 pt) ran words together on both PDFs Debian ships in
/usr/share/doc (shared-mime-info, libtasn1-doc): word recall against poppler's
pdftotext was 0.15 and 0.67; at 0.1 of the font size it was 0.999 and 0.997 (ratios
0.1-0.25 measured; see tests/test_extract_reference.py).

Pages: no characters but images is a scan, and so is a page whose images cover 85 %
of it with at most 20 characters on top (a stamped number); with OCR off it fails
("OCR is not enabled"), with OCR on and Tesseract missing it fails saying what is
missing, with OCR it is read and its method is "ocr". No characters and no images is
a blank page (ok, no blocks, a warning). Glyphs without a Unicode mapping on more than
half the characters also make the page unreadable as text (OCR reads it when
enabled); a few of them become U+FFFD and count as unprintable.
"""

from __future__ import annotations

import gc
import io
import time
import re
import unicodedata
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
import pypdfium2 as pdfium

from . import pdf_text
from typing import TYPE_CHECKING

from .blocks import (
    DocumentFailure,
    ReaderInput,
    PagePart,
    ReadResult,
    heading_block,
    paragraph_block,
    table_block,
)
from .pdf_layout import (
    Line,
    Vocabulary,
    drop_running_lines,
    find_gutters,
    join_lines,
    make_lines,
    order_columns,
)
from . import pdf_navigation, text_layer
from .pdf_grid import find_tables
from .pdf_tables import FoundTable, inside, tables_on
from .pdf_text import LOCK, PageText, Word

if TYPE_CHECKING:
    from .step import ExtractParams
from ..units import Block

SCANNED = "no text layer (scanned page); OCR is not enabled"
NO_UNICODE = "text layer has no Unicode mapping (glyph ids only); OCR is not enabled"
_NO_TEXT = {
    "scan": "no text layer (scanned page)",
    "glyphs": "text layer has no Unicode mapping (glyph ids only)",
}

_BULLET = re.compile(r"^[\u2022\u25e6\u25aa\u25ab\u2023\u2043\u25cf\u25cb\u25a0\u25a1\u2013*\-]\s+")
# A table-of-contents line: dot leaders, then a page number.
_DOT_LEADER = re.compile(r"(?:\.\s?){4,}\s*[\divxlc]+\s*$", re.IGNORECASE)
_CID = re.compile(r"\(cid:\d+\)")
_ASCII_LETTER = re.compile(r"[A-Za-z]")
_LEADING_NUMBER = re.compile(r"^(?:\d+(?:[.)]\d+)*[.)]?|[ivxlc]+[.)]|[a-z][.)])\s+", re.IGNORECASE)
_JUNK_TITLE = re.compile(
    r"^(untitled(\s+document)?|microsoft word\s*-.*|.*\.(docx?|pdf|odt|rtf|txt|tex|indd|qxd))$",
    re.IGNORECASE,
)
_BOLD_NAME = re.compile(r"bold|black|heavy|semibold|demibold|demi\b|extrabold|ultrabold|\bbd\b",
                        re.IGNORECASE)

SMALL_PAGE_CHARS = 200
# Wrapped heading lines: the next baseline within this many font sizes. A chapter label
# ("Chapter 4") may stand further above its title.
_WRAP_PITCH = 1.7
_WRAP_BOX = 1.15
_LABEL_PITCH = 4.0
_MAX_RUN = 4
_LABEL = re.compile(r"^(?:chapter|appendix|part|kapitel|chapitre|cap[ií]tulo|anhang|annexe)\s+"
                    r"(?:\d+|[ivxlc]+|[A-Z])\W?$", re.IGNORECASE)


@dataclass
class PageScan:
    number: int
    height: float = 0.0
    lines: list[Line] = field(default_factory=list)
    tables: list[FoundTable] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    removed: list[dict] = field(default_factory=list)
    failure: str = ""
    error: BaseException | None = None
    no_text: str = ""  # "scan", "glyphs" or "layer": a page for OCR
    layer_reason: str = ""  # why the text layer of a "layer" page is unreadable
    columns: int = 1
    gutters: list[tuple[float, float]] = field(default_factory=list)
    method: str = "text-layer"
    navigation: str = ""
    ocr_blocks: list[Block] = field(default_factory=list)
    duration_ms: float | None = None  # this page's own read (text layer, tables, lines)


# --- opening ------------------------------------------------------------------


def _pdfium_message(exc: BaseException) -> str:
    text = str(exc)
    found = re.search(r"\(PDFium: ([^)]*)\)", text)
    return f"PDFium: {found.group(1)}" if found else f"PDFium: {text}"


def _pdfminer_message(exc: BaseException) -> str:
    inner = exc.args[0] if exc.args and isinstance(exc.args[0], BaseException) else exc
    message = str(inner) or type(inner).__name__
    return f"pdfminer: {message}"


def _is_password_error(exc: BaseException) -> bool:
    inner = exc.args[0] if exc.args and isinstance(exc.args[0], BaseException) else exc
    return type(inner).__name__ == "PDFPasswordIncorrect" or (
        getattr(exc, "err_code", None) == pdfium.raw.FPDF_ERR_PASSWORD
    )


@dataclass
class OutlineEntry:
    level: int  # 1-based
    title: str
    page: int | None  # 1-based


def _doc_facts(doc: pdfium.PdfDocument) -> tuple[int, str, list[OutlineEntry]]:
    """(page count, metadata title, outline). Hold LOCK."""
    count = len(doc)
    try:
        title = (doc.get_metadata_value("Title") or "").strip()
    except Exception:
        title = ""
    outline: list[OutlineEntry] = []
    try:
        for mark in doc.get_toc(max_depth=6):
            dest = mark.get_dest()
            index = dest.get_index() if dest is not None else None
            outline.append(OutlineEntry(
                mark.level + 1,
                mark.get_title() or "",
                index + 1 if index is not None and index >= 0 else None,
            ))
    except Exception:
        outline = []  # a broken outline only costs heading levels
    return count, title, outline


def _truncation_hint(data: bytes) -> str:
    return "" if b"%%EOF" in data[-2048:] else " (no %%EOF marker at the end: the file looks truncated)"


def _unreadable(data: bytes, pdfium_error: str, exc: BaseException) -> DocumentFailure:
    """The whole-document failure, quoting what each parser said."""
    parts = [m for m in (pdfium_error, _pdfminer_message(exc)) if m]
    return DocumentFailure(f"unreadable PDF: {'; '.join(parts)}{_truncation_hint(data)}", exc)


# --- first pass: one page ---------------------------------------------------------


def _failed_scan(number: int, exc: BaseException) -> PageScan:
    return PageScan(
        number=number,
        failure=f"page could not be read: {type(exc).__name__}: {exc}",
        error=exc,
    )


def scan_text(number: int, facts: PageText, tables: list[FoundTable]) -> PageScan:
    """A page's lines (without table text) from its words, or why it has none."""
    scan = PageScan(number=number, height=facts.height)
    if facts.visible_chars == 0 or (facts.visible_chars <= 20 and facts.image_share >= 0.85):
        if facts.images:
            scan.no_text = "scan"
        else:
            scan.warnings.append("blank page (no text, no images)")
        return scan
    if facts.unmapped > facts.visible_chars / 2:
        scan.no_text = "glyphs"
        return scan
    words, columns = facts.words, facts.columns
    if tables:
        scan.tables = tables
        boxes = [t.bbox for t in tables]
        outside = [not inside(w.x0, w.top, w.x1, w.bottom, boxes) for w in words]
        words = [w for w, keep in zip(words, outside) if keep]
        if columns is not None:
            columns = type(columns)(*(c[np.array(outside, dtype=bool)] for c in columns))
    scan.lines = make_lines(words, columns)
    return scan


def _pdfium_pages(doc, count: int) -> list[PageScan]:
    scans: list[PageScan] = []
    for index in range(count):
        number = index + 1
        t0 = time.perf_counter()
        try:
            with LOCK:
                facts = pdf_text.read_page(doc, index)
        except Exception as exc:
            scans.append(_failed_scan(number, exc))
            scans[-1].duration_ms = (time.perf_counter() - t0) * 1000.0
            continue
        found: list[FoundTable] = []
        warnings: list[str] = []
        if facts.ruled and facts.visible_chars:
            try:
                found = find_tables(facts.edges, facts.words)
            except Exception as exc:  # tables are a refinement: the text still counts
                warnings.append(f"tables not read ({type(exc).__name__}: {exc})")
        try:
            scan = scan_text(number, facts, found)
        except Exception as exc:
            scan = _failed_scan(number, exc)
        scan.warnings = warnings + scan.warnings
        scan.duration_ms = (time.perf_counter() - t0) * 1000.0
        scans.append(scan)
    return scans


# --- the pdfminer route, for files PDFium cannot open ------------------------------


def _plumber_words(page) -> PageText:
    facts = PageText(width=float(page.width), height=float(page.height))
    chars = [c for c in page.chars if c.get("text", "").strip()]
    facts.visible_chars = len(chars)
    facts.unmapped = sum(1 for c in chars if c["text"].startswith("(cid:"))
    facts.images = len(page.images)
    area = facts.width * facts.height or 1.0
    facts.image_share = min(1.0, sum(
        max(0.0, float(im["x1"]) - float(im["x0"])) * max(0.0, float(im["bottom"]) - float(im["top"]))
        for im in page.images) / area)
    facts.ruled = bool(page.lines or page.rects)
    for w in page.extract_words(x_tolerance_ratio=0.1, extra_attrs=["size", "fontname"]):
        facts.words.append(Word(
            text=_CID.sub("\ufffd", w["text"]), x0=float(w["x0"]), x1=float(w["x1"]),
            top=float(w["top"]), bottom=float(w["bottom"]), size=float(w["size"]),
            bold=bool(_BOLD_NAME.search(str(w["fontname"]).split("+", 1)[-1])),
            chars=len(w["text"]),
        ))
    return facts


def _pdfminer_pages(data: bytes, pdfium_error: str, params: ExtractParams,
                    warnings: list[str]) -> list[PageScan]:
    import pdfplumber
    import pdfplumber.page
    from pdfminer.pdfpage import PDFPage

    class _PageOrError(PDFPage):
        """A pdfminer page that keeps its construction error instead of raising it,
        so one page with a broken attribute does not end the page-tree walk."""

        def __init__(self, doc, pageid, attrs, label) -> None:  # noqa: ANN001 (pdfminer's)
            self.error: BaseException | None = None
            try:
                super().__init__(doc, pageid, attrs, label)
            except Exception as exc:
                self.error = exc

    try:
        pdf = pdfplumber.open(io.BytesIO(data))
    except Exception as exc:
        if _is_password_error(exc):
            raise DocumentFailure("password protected", exc) from exc
        raise _unreadable(data, pdfium_error, exc) from exc
    try:
        count = sum(1 for _ in _PageOrError.create_pages(pdf.doc))
    except Exception as exc:
        raise _unreadable(data, pdfium_error, exc) from exc
    if not count:
        raise DocumentFailure(f"unreadable PDF: no pages{_truncation_hint(data)}")
    if count > params.max_pages:
        raise DocumentFailure(f"too many pages: {count} over the limit of {params.max_pages}")
    warnings.append(f"read with pdfminer only ({pdfium_error}); outline not used")

    scans: list[PageScan] = []
    doctop = 0.0
    for number, page_obj in enumerate(_PageOrError.create_pages(pdf.doc), start=1):
        if page_obj.error is not None:
            scans.append(_failed_scan(number, page_obj.error))
            continue
        try:
            page = pdfplumber.page.Page(pdf, page_obj, page_number=number, initial_doctop=doctop)
            doctop += float(page.height)
            facts = _plumber_words(page)
            found = tables_on(page) if facts.ruled and facts.visible_chars else []
            scans.append(scan_text(number, facts, found))
            page.close()
        except Exception as exc:
            scans.append(_failed_scan(number, exc))
    return scans


# --- OCR ---------------------------------------------------------------------


def _why_no_text(scan: PageScan) -> str:
    return _NO_TEXT.get(scan.no_text) or scan.layer_reason


def judge_text_layers(scans: list[PageScan]) -> None:
    """Pages whose text layer reads as the wrong characters become pages for OCR
    (text_layer.unreadable), their lines dropped."""
    for scan in scans:
        if scan.failure or scan.no_text or not scan.lines:
            continue
        reason = text_layer.unreadable("\n".join(ln.text for ln in scan.lines))
        if reason:
            scan.no_text, scan.layer_reason, scan.lines = "layer", reason, []


def _ocr_pages(doc, scans: list[PageScan], params: ExtractParams) -> None:
    """Read the pages without a text layer with Tesseract, or say why they stay unread."""
    wanted = [s for s in scans if s.no_text]
    if not wanted:
        return
    if not params.ocr:
        for scan in wanted:
            scan.failure = f"{_why_no_text(scan)}; OCR is not enabled"
        return
    from . import pdf_ocr

    missing = pdf_ocr.unavailable(params.ocr_language)
    if missing or doc is None:
        why = missing or "the page cannot be rendered (PDFium could not open the file)"
        for scan in wanted:
            scan.failure = f"{_why_no_text(scan)}; OCR is not available: {why}"
        return
    for scan in wanted:
        try:
            with LOCK:
                page = doc[scan.number - 1]
                try:
                    bitmap = page.render(scale=params.ocr_dpi / 72, grayscale=True)
                    # A copy: the PIL image would otherwise share the bitmap's memory,
                    # which is freed here, under the lock, not by a later finaliser.
                    image = bitmap.to_pil().copy()
                    bitmap.close()
                finally:
                    page.close()
            result = pdf_ocr.read_image(image, params.ocr_language, params.time_limit_seconds)
        except Exception as exc:
            scan.failure = f"{_why_no_text(scan)}; OCR failed: {type(exc).__name__}: {exc}"
            scan.error = exc
            continue
        if not result.paragraphs:
            scan.failure = f"{_why_no_text(scan)}; OCR found no text"
            continue
        scan.method = "ocr"
        scan.ocr_blocks = [b for b in (paragraph_block(p) for p in result.paragraphs) if b]
        if scan.layer_reason:
            scan.warnings.append(f"read by OCR instead of its text layer: {scan.layer_reason}")
        scan.warnings.append(
            f"text from OCR (Tesseract {result.version}, language {params.ocr_language}, "
            f"{params.ocr_dpi} dpi): {result.words} words, mean word confidence "
            f"{result.confidence:.0f} of 100"
        )


# --- second pass: the document --------------------------------------------------


def _size_mode(lines: list[Line]) -> tuple[float, int]:
    weights: Counter = Counter()
    for ln in lines:
        weights[round(ln.size * 2) / 2] += ln.chars
    if not weights:
        return 0.0, 0
    return weights.most_common(1)[0][0], sum(weights.values())


def _is_heading(line: Line, body: float, body_bold: bool, ratio: float) -> bool:
    text = line.text
    # Has a letter: in ASCII text one search (str.isalpha per character is the slow part).
    letter = _ASCII_LETTER.search(text) is not None if text.isascii() else any(ch.isalpha() for ch in text)
    if not letter or _DOT_LEADER.search(text):
        return False
    words = len(line.text.split())
    if body and line.size >= ratio * body and words <= 20:
        return True
    return (
        line.bold
        and not body_bold
        and (not body or line.size >= 0.95 * body)
        and words <= 12
        and not line.text.endswith((".", ",", ";", ":"))
    )


_NOT_ALNUM = re.compile(r"[\W_]+")  # removes exactly what str.isalnum() rejects


@lru_cache(maxsize=8192)  # every outline entry of a page compares against the same lines
def _norm(text: str) -> str:
    return _NOT_ALNUM.sub("", unicodedata.normalize("NFKC", text).casefold())


@lru_cache(maxsize=8192)  # asked for every line once per outline entry the headings missed
def _norm_variants(text: str) -> frozenset[str]:
    stripped = _LEADING_NUMBER.sub("", text.strip())
    return frozenset(v for v in (_norm(text), _norm(stripped)) if v)


def _wrapped(prev: Line, ln: Line) -> bool:
    """True when `ln` continues heading line `prev`: same style and column, on the next
    line at a heading's pitch. Heading boxes often overlap (accents and tall glyphs make
    them higher than the font size), so the tops are compared, against the larger of
    _WRAP_PITCH font sizes and _WRAP_BOX times the line's box height."""
    pitch = min(ln.top - prev.top, ln.bottom - prev.bottom)
    limit = max(_WRAP_PITCH * max(prev.size, 1.0), _WRAP_BOX * (prev.bottom - prev.top))
    return (prev.style == ln.style and prev.column == ln.column
            and 0 < pitch and ln.top - prev.top <= limit)


def _join_into(prev: Line, ln: Line) -> None:
    prev.text = join_lines(prev.text, ln.text)
    prev.bottom = max(prev.bottom, ln.bottom)
    prev.chars += ln.chars


_QUOTES = str.maketrans({c: "'" for c in "\u2018\u2019\u201a\u201b\u201c\u201d\u201e`\u00b4\""})


def _outline_text(line: str, title: str) -> str:
    """The outline's title (after the line's own section number when the title lacks
    it) when the line's text looks damaged (combining marks, replacement characters) or
    differs from the title only in spaces, hyphens and quote shapes (a hyphen lost at a
    line break); otherwise the line's own text (an outline may leave out signs such as
    "<" that the page shows)."""
    title = " ".join(title.split())
    number = _LEADING_NUMBER.match(line)
    body = line[number.end():] if number and not _LEADING_NUMBER.match(title) else line

    def loose(s: str) -> str:
        return re.sub(r"[\s\-\u00ad']", "", s.translate(_QUOTES))

    damaged = "\ufffd" in line or any(unicodedata.category(c) == "Mn" for c in line)
    if not damaged and loose(body) != loose(title):
        return line
    return (number.group(0) if body is not line else "") + title


def _merge_wrapped(lines: list[Line]) -> list[Line]:
    """Join consecutive heading lines of one style that sit close together, hyphens at
    line ends joined by the body rule (pdf_layout.join_lines)."""
    out: list[Line] = []
    for ln in lines:
        prev = out[-1] if out else None
        if prev is not None and prev.heading and ln.heading and _wrapped(prev, ln):
            _join_into(prev, ln)
            continue
        out.append(ln)
    return out


def _join_labels(lines: list[Line]) -> list[Line]:
    """A chapter label line ("Chapter 4", "Appendix B") joins the heading after it."""
    out: list[Line] = []
    for ln in lines:
        prev = out[-1] if out else None
        if (prev is not None and prev.heading and ln.heading and _LABEL.match(prev.text)
                and prev.column == ln.column
                and 0 < ln.top - prev.top <= _LABEL_PITCH * max(prev.size, ln.size, 1.0)):
            ln.text = f"{prev.text.rstrip('.:')}. {ln.text}"
            ln.top = prev.top
            ln.chars += prev.chars
            out[-1] = ln
            continue
        out.append(ln)
    return out


def _outline_runs(scan: PageScan, entry: OutlineEntry) -> bool:
    """Join the run of up to _MAX_RUN consecutive lines whose text together is the
    entry's title into one heading at the entry's level; True when found."""
    wanted = _norm_variants(entry.title)
    lines = scan.lines
    for i in range(len(lines)):
        text = lines[i].text
        for j in range(i + 1, min(len(lines), i + _MAX_RUN)):
            if lines[j].column != lines[i].column or not _wrapped(lines[j - 1], lines[j]):
                break
            text = join_lines(text, lines[j].text)
            if _norm_variants(text) & wanted:
                head = lines[i]
                for ln in lines[i + 1:j + 1]:
                    _join_into(head, ln)
                head.heading = True
                head.level = min(6, entry.level)
                head.text = _outline_text(head.text, entry.title)
                del lines[i + 1:j + 1]
                return True
    return False


def classify_headings(scans: list[PageScan], ratio: float, outline: list[OutlineEntry]) -> None:
    pages = [s for s in scans if not s.failure and s.lines]
    all_lines = [ln for s in pages for ln in s.lines]
    doc_body, _ = _size_mode(all_lines)
    for scan in pages:
        body, weight = _size_mode(scan.lines)
        if weight < SMALL_PAGE_CHARS:
            body = doc_body
        body_chars = [ln for ln in scan.lines if round(ln.size * 2) / 2 == body]
        bold_chars = sum(ln.chars for ln in body_chars if ln.bold)
        body_bold = bool(body_chars) and bold_chars > 0.5 * sum(ln.chars for ln in body_chars)
        for ln in scan.lines:
            ln.heading = _is_heading(ln, body, body_bold, ratio)
        scan.lines = _merge_wrapped(scan.lines)

    # Outline: match entries to headings (or promote body lines) on their page.
    learned: dict[tuple[float, bool], Counter] = defaultdict(Counter)
    by_page: dict[int | None, list[OutlineEntry]] = defaultdict(list)
    for entry in outline:
        by_page[entry.page].append(entry)
    for scan in pages:
        entries = by_page.get(scan.number, []) + by_page.get(None, [])
        if not entries:
            continue
        unmatched = list(entries)
        for ln in scan.lines:
            if not ln.heading:
                continue
            variants = _norm_variants(ln.text)
            for entry in unmatched:
                if variants & _norm_variants(entry.title):
                    ln.level = min(6, entry.level)
                    ln.text = _outline_text(ln.text, entry.title)
                    learned[ln.style][ln.level] += 1
                    unmatched.remove(entry)
                    break
        for entry in unmatched:
            wanted = _norm_variants(entry.title)
            for ln in scan.lines:
                if not ln.heading and _norm_variants(ln.text) & wanted:
                    ln.heading = True
                    ln.level = min(6, entry.level)
                    ln.text = _outline_text(ln.text, entry.title)
                    break
            else:
                # A title set on several lines that the style rule did not join.
                _outline_runs(scan, entry)

    styles = sorted(
        {ln.style for s in pages for ln in s.lines if ln.heading},
        key=lambda st: (-st[0], not st[1]),
    )
    rank = {st: min(6, i + 1) for i, st in enumerate(styles)}
    for scan in pages:
        for ln in scan.lines:
            if ln.heading and not ln.level:
                if ln.style in learned:
                    ln.level = learned[ln.style].most_common(1)[0][0]
                else:
                    ln.level = rank.get(ln.style, 1)
        scan.lines = _join_labels(scan.lines)


def _place_tables(scan: PageScan) -> list[object]:
    """Lines and tables in reading order: a table goes before the first line below it
    in its column (a table across the gutter: below it in any column)."""
    items: list[object] = list(scan.lines)
    mids = [(g0 + g1) / 2 for g0, g1 in scan.gutters]
    for table in sorted(scan.tables, key=lambda t: t.top):
        x0, _top, x1, _bottom = table.bbox
        column = -1
        if mids:
            spans = [m for m in mids if x0 < m < x1]
            if not spans:
                column = sum(1 for m in mids if m < (x0 + x1) / 2)
        at = len(items)
        for k, item in enumerate(items):
            if isinstance(item, Line) and item.top >= table.top and (
                column == -1 or item.column in (column, -1) or not mids
            ):
                at = k
                break
        items.insert(at, table)
    return items


def page_blocks(scan: PageScan, vocab: Vocabulary | None = None) -> list[Block]:
    body = [ln for ln in scan.lines if not ln.heading]
    gaps = sorted(
        b.top - a.bottom
        for a, b in zip(body, body[1:])
        if a.column == b.column and -1.0 <= b.top - a.bottom <= 2.0 * max(a.bottom - a.top, 1.0)
    )
    usual = gaps[len(gaps) // 4] if gaps else None

    blocks: list[Block] = []
    para: list[str] = []  # logical lines of the running paragraph
    prev: Line | None = None

    def flush() -> None:
        nonlocal prev
        if para:
            block = paragraph_block("\n".join(para))
            if block:
                blocks.append(block)
        para.clear()
        prev = None

    for item in _place_tables(scan):
        if isinstance(item, FoundTable):
            flush()
            block = table_block(item.rows)
            if block:
                blocks.append(block)
            continue
        ln = item
        if ln.heading:
            flush()
            block = heading_block(ln.text, ln.level or 1)
            if block:
                blocks.append(block)
            continue
        if prev is not None:
            height = max(prev.bottom - prev.top, 1.0)
            indented = (
                0.8 * ln.size < ln.indent - prev.indent < 8 * ln.size
                and not (para and para[-1].startswith("- "))
            )
            if ln.column != prev.column:
                # On to the next column: the paragraph goes on unless this line is
                # indented against its own column's left edge.
                new_para = 0.8 * ln.size < ln.indent < 8 * ln.size or abs(ln.size - prev.size) > 1.0
            else:
                gap = ln.top - prev.bottom
                base = usual if usual is not None else 0.2 * height
                new_para = gap > base + 0.4 * height or abs(ln.size - prev.size) > 1.0 or indented
            if new_para:
                flush()
        bullet = _BULLET.match(ln.text)
        if bullet:
            para.append("- " + ln.text[bullet.end():])
        elif para:
            para[-1] = join_lines(para[-1], ln.text, vocab)
        else:
            para.append(ln.text)
        prev = ln
    flush()
    return blocks


def _outline_navigation(outline: list[OutlineEntry], page_count: int) -> set[int]:
    """Pages of the outline's sections titled like an index or a contents list."""
    marked = sorted((e.page, e.title) for e in outline if e.page)
    out: set[int] = set()
    for k, (page, title) in enumerate(marked):
        if pdf_navigation.OUTLINE_TITLE.match(title):
            nxt = next((p for p, _ in marked[k + 1:] if p > page), page_count + 1)
            out.update(range(page, nxt))
    return out


def judge_navigation(text_pages: list[PageScan], page_count: int,
                     outline: list[OutlineEntry] | None = None) -> None:
    """Set each page's navigation kind (pdf_navigation); on a chapter's opening page,
    remove its contents entries instead (recorded like running headers)."""
    named = _outline_navigation(outline or [], page_count)
    prev = (None, "")
    for scan in text_pages:
        lines = [ln.text for ln in scan.lines]
        heads = [ln.text for ln in scan.lines if ln.heading]
        judgement = pdf_navigation.judge_page(lines, heads, page_count)
        if not judgement.kind and scan.number in named:
            judgement = pdf_navigation.judge_page(
                lines, heads, page_count, pdf_navigation.NEXT_MIN_ENTRIES,
                pdf_navigation.NEXT_ENTRY_SHARE, ordered=False)
        if not judgement.kind and prev[1] and prev[0] == scan.number - 1:
            judgement = pdf_navigation.judge_page(
                lines, heads, page_count, pdf_navigation.NEXT_MIN_ENTRIES,
                pdf_navigation.NEXT_ENTRY_SHARE)
        if judgement.kind:
            heading_at = {i for i, ln in enumerate(scan.lines) if ln.heading}
            words = pdf_navigation.body_after_entries(lines, judgement.entries, heading_at)
            if words >= pdf_navigation.BODY_WORDS:
                drop = set(judgement.entries)
                for i in sorted(drop):
                    scan.removed.append({
                        "kind": "contents entry",
                        "text": lines[i],
                        "reason": f"a {judgement.kind} entry above {words} words of text "
                                  "on the same page",
                    })
                scan.lines = [ln for i, ln in enumerate(scan.lines) if i not in drop]
                judgement = pdf_navigation.Judgement()
        scan.navigation = judgement.kind
        prev = (scan.number, judgement.kind)


# --- the reader ---------------------------------------------------------------


def read_pdf(inp: ReaderInput) -> ReadResult:
    """A PDF's pages, with Python's cycle collector paused while they are read.

    Why: a page makes hundreds of short-lived tuples, lists and Line objects with no
    reference cycles among them (reference counting frees them), but every 700
    allocations start a collection that walks them all, now and then one walks the
    document's lines so far, and in a worker with the text steps' tables loaded
    (136,000 tracked objects) the full collections walk those too: 0.7 ms a page
    directly, 1.5 ms in such a worker, on the Debian PDFs of `bench goals` (a gc
    callback's thread time). The collector is restored on the way out, so cycles made
    meanwhile are collected at its next run; it is left off when it was off already
    (another thread in here, or the caller's choice).
    """
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        return _read_pdf(inp)
    finally:
        if was_enabled:
            gc.enable()


def _read_pdf(inp: ReaderInput) -> ReadResult:
    data, params = inp.data, inp.params
    warnings: list[str] = []
    outline: list[OutlineEntry] = []
    meta_title = ""
    pdfium_error = ""
    doc = None
    try:
        with LOCK:
            doc = pdfium.PdfDocument(data)
            count, meta_title, outline = _doc_facts(doc)
    except Exception as exc:
        if _is_password_error(exc):
            raise DocumentFailure("password protected", exc) from exc
        pdfium_error = _pdfium_message(exc)
        doc = None

    try:
        if doc is not None:
            if count > params.max_pages:
                raise DocumentFailure(f"too many pages: {count} over the limit of {params.max_pages}")
            scans = _pdfium_pages(doc, count)
        else:
            scans = _pdfminer_pages(data, pdfium_error, params, warnings)
            count = len(scans)
        judge_text_layers(scans)
        _ocr_pages(doc, scans, params)
    finally:
        if doc is not None:
            with LOCK:
                doc.close()

    text_pages = [s for s in scans if not s.failure and s.lines]
    titles = [e.title for e in outline] + ([meta_title] if meta_title else [])
    removals = drop_running_lines([(s.height, s.lines) for s in text_pages], titles)
    for scan, removed in zip(text_pages, removals):
        scan.removed = removed
        if removed:
            names = "; ".join(f"'{r['text']}'" for r in removed)
            scan.warnings.append(f"dropped running header/footer: {names}")
    for scan in text_pages:
        em, _ = _size_mode(scan.lines)
        scan.gutters = find_gutters(scan.lines, em)
        scan.columns = len(scan.gutters) + 1
        scan.lines = order_columns(scan.lines, scan.gutters)
    classify_headings(scans, params.pdf_heading_ratio, outline)
    judge_navigation(text_pages, count, outline)
    vocab = Vocabulary()
    for scan in text_pages:
        vocab.add("\n".join(ln.text for ln in scan.lines if not ln.heading))

    parts_out: list[PagePart] = []
    for scan in scans:
        part = PagePart(page=scan.number, warnings=scan.warnings, failure=scan.failure,
                        error=scan.error, method=scan.method, columns=scan.columns,
                        removed=scan.removed, navigation=scan.navigation,
                        duration_ms=scan.duration_ms, fields={"layer_problem": scan.layer_reason})
        if not scan.failure:
            try:
                part.blocks = scan.ocr_blocks if scan.method == "ocr" else page_blocks(scan, vocab)
            except Exception as exc:
                part.failure = f"page layout could not be read: {type(exc).__name__}: {exc}"
                part.error = exc
        parts_out.append(part)

    title = meta_title if meta_title and not _JUNK_TITLE.match(meta_title) else ""
    return ReadResult(
        format="pdf",
        method="text-layer",
        pages=parts_out,
        title=title,
        encoding="",
        page_count=count,
        warnings=warnings,
    )
