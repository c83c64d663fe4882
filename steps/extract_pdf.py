"""PDF text layer, page by page, with pdfplumber; outline and metadata from pypdfium2.

Two passes. The first reads each page on its own (a page that fails is recorded and
the others go on): its ruled tables, then its text lines (without the tables'
characters), each line with its dominant font size and whether it is bold. The second
pass sees the whole document and decides what needs more than one page:

Running headers and footers. A line among the first two or last two of a page, in the
top or bottom 8 % of it, whose text (digits ignored, so page numbers match) recurs
within 3 pt of the same height on at least half of the text pages (and on 2 or more)
is dropped, with a warning on the page naming it. (Common practice; thresholds ours.
On the two PDFs Debian ships in /usr/share/doc, headers sit at 6 % of the page
height and the first body line at 9 %.)

Headings. The body size of a page is the font size that most of its characters have
(rounded to 0.5 pt); a page with fewer than 200 characters uses the document's body
size instead, so a title page is judged against the text that follows. A line is a
heading when it has a letter, at most 20 words, and either
  - its size is at least `pdf_heading_ratio` times the body size, or
  - it is bold (80 % of its characters in a bold face), at least body size, at most
    12 words, and does not end like a sentence or a run-in label (. , ; :),
    unless the page's body text is itself bold.
Consecutive heading lines of the same style close together are one wrapped heading.
Levels: when the PDF has an outline (bookmarks), a heading whose text matches an
outline entry on the same page (case, spacing and punctuation ignored; a leading
section number may differ) takes that entry's depth; an outline entry that no
heading matched promotes the body line with that text on its page. Headings of a
style that matched no entry take the level most entries of that style had; failing
that, levels rank the heading styles of the document by size (bold first on a tie).

Paragraphs. Body lines in reading order (top to bottom) join with spaces; a word
hyphenated at a line end is joined (hyphen removed) when the next line starts in
the same case as the letter before the hyphen ("re-" "newed", "ELE-" "MENT"; common
practice, and what pdftotext does; a real hyphen broken at the line end is lost). A new
paragraph starts after a heading or a table, when the font size changes by more than
1 pt, when the gap above a line exceeds the page's usual line gap by 0.4 line
heights, or when a line starts 0.8 to 8 em right of the line above (a first-line
indent, as books and Texinfo manuals mark paragraphs; not under a list item, whose
wrapped lines hang indented). A line starting with a bullet glyph starts a new
"- item" line. Table-of-contents lines (dot leaders and a page number) are never
headings.

Tables. pdfplumber's find_tables with its ruling-line strategy, only on pages that
have lines or rectangles; a grid of at least 2 x 2 cells with text is a TABLE block,
placed by its top edge among the paragraphs, and the characters inside it are left
out of the running text. A smaller grid (a framed box) is read as running text.

Words. A gap wider than 0.1 of the font size between two characters is a word break
(see TEXT_SETTINGS for the measurement behind it). Reading order is top to bottom:
lines side by side in two columns are not yet told apart.

Pages: no characters but images is a scan (failed, OCR not enabled), and so is a page
whose images cover 85 % of it with at most 20 characters on top (a stamped number);
no characters and no images is a blank page (ok, no blocks, a warning). Glyphs
without a Unicode mapping ("(cid:N)" on more than half the characters) also fail the
page; a few of them become U+FFFD and count as unprintable.
"""

from __future__ import annotations

import io
import re
import threading
import unicodedata
from collections import Counter, defaultdict
from dataclasses import dataclass, field

import pdfplumber
import pdfplumber.page
import pypdfium2 as pdfium
from pdfminer.encodingdb import EncodingDB
from pdfminer.pdfpage import PDFPage

from .extract import (
    DocumentFailure,
    ExtractParams,
    PagePart,
    ReadResult,
    heading_block,
    paragraph_block,
    table_block,
    table_shape,
)
from .units import Block

# PDF Reference 1.7, appendix D, note to the WinAnsiEncoding table (from memory): every
# unused code above octal 40 shows the bullet. pdfminer leaves them unmapped and writes
# "(cid:127)"; poppler's pdftotext prints "•", and reportlab (which made the demo
# drive) encodes its bullets as code 127. So fill the gaps, never replacing a mapping.
for _code in (0x7F, 0x81, 0x8D, 0x8F, 0x90, 0x9D):
    EncodingDB.win2unicode.setdefault(_code, "\u2022")

SCANNED = "no text layer (scanned page); OCR is not enabled"
NO_UNICODE = "text layer has no Unicode mapping (glyph ids only); OCR is not enabled"

# PDFium is not thread-safe (pypdfium2's documentation); the flows layer may run
# extraction in threads, so every PDFium call here holds this lock.
_PDFIUM_LOCK = threading.Lock()

_BOLD = re.compile(r"bold|black|heavy|semibold|demibold|demi\b|extrabold|ultrabold|\bbd\b",
                   re.IGNORECASE)
_BULLET = re.compile(r"^[\u2022\u25e6\u25aa\u25ab\u2023\u2043\u25cf\u25cb\u25a0\u25a1\u2013*\-]\s+")
_DIGITS = re.compile(r"\d+")
# A table-of-contents line: dot leaders, then a page number.
_DOT_LEADER = re.compile(r"(?:\.\s?){4,}\s*[\divxlc]+\s*$", re.IGNORECASE)
_CID = re.compile(r"\(cid:\d+\)")
_LEADING_NUMBER = re.compile(r"^(?:\d+(?:[.)]\d+)*[.)]?|[ivxlc]+[.)]|[a-z][.)])\s+", re.IGNORECASE)
_JUNK_TITLE = re.compile(
    r"^(untitled(\s+document)?|microsoft word\s*-.*|.*\.(docx?|pdf|odt|rtf|txt|tex|indd|qxd))$",
    re.IGNORECASE,
)

SMALL_PAGE_CHARS = 200
# A gap wider than this share of the font size between two characters is a word break.
# pdfplumber's default (a fixed 3 pt) ran words together on both PDFs Debian ships in
# /usr/share/doc (shared-mime-info, libtasn1-doc): word recall against poppler's
# pdftotext was 0.15 and 0.67; at 0.1 of the font size it was 0.999 and 0.997
# (ratios 0.1-0.25 measured; see tests/test_extract_reference.py).
TEXT_SETTINGS = {"x_tolerance_ratio": 0.1}
MARGIN_SHARE = 0.08
REPEAT_Y_TOLERANCE = 3.0


@dataclass
class Line:
    text: str
    top: float
    bottom: float
    x0: float
    size: float
    bold: bool
    chars: int
    heading: bool = False
    level: int = 0

    @property
    def style(self) -> tuple[float, bool]:
        return (round(self.size * 2) / 2, self.bold)


@dataclass
class FoundTable:
    top: float
    rows: list[list[str]]


@dataclass
class PageScan:
    number: int
    height: float = 0.0
    lines: list[Line] = field(default_factory=list)
    tables: list[FoundTable] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    failure: str = ""
    error: BaseException | None = None


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


def _pdfium_facts(data: bytes) -> tuple[int, str, list[OutlineEntry]]:
    """(page count, metadata title, outline); raises PdfiumError if PDFium cannot open it."""
    with _PDFIUM_LOCK:
        doc = pdfium.PdfDocument(data)
        try:
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
        finally:
            doc.close()
    return count, title, outline


def _truncation_hint(data: bytes) -> str:
    return "" if b"%%EOF" in data[-2048:] else " (no %%EOF marker at the end: the file looks truncated)"


def _unreadable(data: bytes, pdfium_error: str, exc: BaseException) -> DocumentFailure:
    """The whole-document failure, quoting what each parser said."""
    parts = [m for m in (pdfium_error, _pdfminer_message(exc)) if m]
    return DocumentFailure(f"unreadable PDF: {'; '.join(parts)}{_truncation_hint(data)}", exc)


# --- first pass: one page ---------------------------------------------------------


def _is_bold(fontname: str) -> bool:
    return bool(_BOLD.search(fontname.split("+", 1)[-1]))


def _line_from(raw: dict) -> Line | None:
    chars = [c for c in raw.get("chars", []) if c.get("text", "").strip()]
    if not chars or not raw.get("text", "").strip():
        return None
    sizes = Counter(round(float(c.get("size", 0.0)), 1) for c in chars)
    bold = sum(1 for c in chars if _is_bold(str(c.get("fontname", ""))))
    return Line(
        # A glyph without a Unicode mapping reads "(cid:N)"; it stands for one unknown
        # character, so it becomes U+FFFD and counts as unprintable.
        text=_CID.sub("\ufffd", raw["text"].strip()),
        top=float(raw["top"]),
        bottom=float(raw["bottom"]),
        x0=float(raw["x0"]),
        size=sizes.most_common(1)[0][0],
        bold=bold >= 0.8 * len(chars),
        chars=len(chars),
    )


def _inside(obj: dict, boxes: list[tuple[float, float, float, float]]) -> bool:
    cx = (obj["x0"] + obj["x1"]) / 2
    cy = (obj["top"] + obj["bottom"]) / 2
    return any(x0 <= cx <= x1 and top <= cy <= bottom for x0, top, x1, bottom in boxes)


def scan_page(page, number: int) -> PageScan:
    scan = PageScan(number=number, height=float(page.height))
    chars = page.chars
    visible = [c for c in chars if c.get("text", "").strip()]
    if not visible or _mostly_image(page, visible):
        if page.images:
            scan.failure = SCANNED
        else:
            scan.warnings.append("blank page (no text, no images)")
        return scan
    cid = sum(1 for c in visible if c["text"].startswith("(cid:"))
    if cid > len(visible) / 2:
        scan.failure = NO_UNICODE
        return scan

    boxes = []
    if page.lines or page.rects:
        for table in page.find_tables():
            rows = table.extract(**TEXT_SETTINGS)
            n_rows, n_cols = table_shape(rows)
            if n_rows >= 2 and n_cols >= 2:
                scan.tables.append(FoundTable(top=float(table.bbox[1]), rows=rows))
                boxes.append(table.bbox)
    text_page = page
    if boxes:
        text_page = page.filter(
            lambda obj: obj.get("object_type") != "char" or not _inside(obj, boxes)
        )
    for raw in text_page.extract_text_lines(return_chars=True, **TEXT_SETTINGS):
        line = _line_from(raw)
        if line:
            scan.lines.append(line)
    scan.lines.sort(key=lambda ln: (ln.top, ln.x0))
    return scan


def _mostly_image(page, visible: list) -> bool:
    """A scan with a few stray characters (a stamped number): images cover the page."""
    if len(visible) > 20 or not page.images:
        return False
    area = float(page.width) * float(page.height) or 1.0
    covered = sum(
        max(0.0, float(im["x1"]) - float(im["x0"])) * max(0.0, float(im["bottom"]) - float(im["top"]))
        for im in page.images
    )
    return covered >= 0.85 * area


# --- second pass: the document --------------------------------------------------


def _repeat_key(text: str) -> str:
    return _DIGITS.sub("#", " ".join(text.split())).casefold()


def drop_running_lines(scans: list[PageScan]) -> None:
    """Remove header/footer lines that recur at the same height on most pages."""
    text_pages = [s for s in scans if not s.failure and s.lines]
    if len(text_pages) < 2:
        return
    candidates: dict[int, list[tuple[Line, str]]] = {}
    seen: dict[str, list[tuple[int, float]]] = defaultdict(list)
    for scan in text_pages:
        lines = scan.lines
        picked = []
        edge = lines[:2] + [ln for ln in lines[-2:] if ln not in lines[:2]]
        for ln in edge:
            if ln.top <= MARGIN_SHARE * scan.height or ln.bottom >= (1 - MARGIN_SHARE) * scan.height:
                key = _repeat_key(ln.text)
                picked.append((ln, key))
                seen[key].append((scan.number, ln.top))
        candidates[scan.number] = picked
    need = max(2, (len(text_pages) + 1) // 2)
    for scan in text_pages:
        removed = []
        for ln, key in candidates[scan.number]:
            pages = {n for n, top in seen[key] if abs(top - ln.top) <= REPEAT_Y_TOLERANCE}
            if len(pages) >= need:
                removed.append(ln)
        if removed:
            scan.lines = [ln for ln in scan.lines if all(ln is not r for r in removed)]
            names = "; ".join(f"'{ln.text}'" for ln in removed)
            scan.warnings.append(f"dropped running header/footer: {names}")


def _size_mode(lines: list[Line]) -> tuple[float, int]:
    weights: Counter = Counter()
    for ln in lines:
        weights[round(ln.size * 2) / 2] += ln.chars
    if not weights:
        return 0.0, 0
    return weights.most_common(1)[0][0], sum(weights.values())


def _is_heading(line: Line, body: float, body_bold: bool, ratio: float) -> bool:
    if not any(ch.isalpha() for ch in line.text) or _DOT_LEADER.search(line.text):
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


def _norm(text: str) -> str:
    text = unicodedata.normalize("NFKC", text).casefold()
    return "".join(ch for ch in text if ch.isalnum())


def _norm_variants(text: str) -> set[str]:
    stripped = _LEADING_NUMBER.sub("", text.strip())
    return {v for v in (_norm(text), _norm(stripped)) if v}


def _merge_wrapped(lines: list[Line]) -> list[Line]:
    """Join consecutive heading lines of one style that sit close together."""
    out: list[Line] = []
    for ln in lines:
        prev = out[-1] if out else None
        if (
            prev is not None
            and prev.heading
            and ln.heading
            and prev.style == ln.style
            and ln.top - prev.bottom <= 0.6 * max(prev.bottom - prev.top, 1.0)
        ):
            prev.text = f"{prev.text} {ln.text}"
            prev.bottom = ln.bottom
            prev.chars += ln.chars
            continue
        out.append(ln)
    return out


def classify_headings(scans: list[PageScan], ratio: float, outline: list[OutlineEntry]) -> None:
    pages = [s for s in scans if not s.failure]
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
                    learned[ln.style][ln.level] += 1
                    unmatched.remove(entry)
                    break
        for entry in unmatched:
            wanted = _norm_variants(entry.title)
            for ln in scan.lines:
                if not ln.heading and _norm_variants(ln.text) & wanted:
                    ln.heading = True
                    ln.level = min(6, entry.level)
                    break

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


def _join(current: str, line: str) -> str:
    if not current:
        return line
    if current.endswith("\u00ad"):
        return current[:-1] + line
    if current.endswith("-") and len(current) >= 2 and current[-2].isalpha() and line[:1].isalpha():
        before, after = current[-2], line[0]
        if (before.islower() and after.islower()) or (before.isupper() and after.isupper()):
            return current[:-1] + line
    return f"{current} {line}"


def page_blocks(scan: PageScan) -> list[Block]:
    body = [ln for ln in scan.lines if not ln.heading]
    gaps = sorted(
        b.top - a.bottom
        for a, b in zip(body, body[1:])
        if -1.0 <= b.top - a.bottom <= 2.0 * max(a.bottom - a.top, 1.0)
    )
    usual = gaps[len(gaps) // 4] if gaps else None

    items: list[tuple[float, int, object]] = [(ln.top, 0, ln) for ln in scan.lines]
    items += [(t.top, 1, t) for t in scan.tables]
    items.sort(key=lambda it: (it[0], it[1]))

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

    for _top, _order, item in items:
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
            gap = ln.top - prev.bottom
            base = usual if usual is not None else 0.2 * height
            indented = (
                0.8 * ln.size < ln.x0 - prev.x0 < 8 * ln.size
                and not (para and para[-1].startswith("- "))
            )
            if gap > base + 0.4 * height or abs(ln.size - prev.size) > 1.0 or indented:
                flush()
        bullet = _BULLET.match(ln.text)
        if bullet:
            para.append("- " + ln.text[bullet.end():])
        elif para:
            para[-1] = _join(para[-1], ln.text)
        else:
            para.append(ln.text)
        prev = ln
    flush()
    return blocks


# --- the reader ---------------------------------------------------------------


class _PageTreeError(Exception):
    """pdfminer could not walk on through the page tree (the cause says why)."""


class _PageOrError(PDFPage):
    """A pdfminer page that keeps its construction error instead of raising it.

    pdfminer builds pages inside its page-tree walk, so one page with a broken
    attribute (a MediaBox that is not four numbers, say) would end the walk and lose
    every later page; this way the walk goes on and only that page fails.
    """

    def __init__(self, doc, pageid, attrs, label) -> None:  # noqa: ANN001 (pdfminer's)
        self.error: BaseException | None = None
        try:
            super().__init__(doc, pageid, attrs, label)
        except Exception as exc:
            self.error = exc


def _pages(pdf):
    """(number, page or None, error or None) for each page, one page's fault its own."""
    walk = _PageOrError.create_pages(pdf.doc)
    doctop = 0.0
    number = 0
    while True:
        number += 1
        try:
            page_obj = next(walk)
        except StopIteration:
            return
        except Exception as exc:
            wrapped = _PageTreeError(str(exc))
            wrapped.__cause__ = exc
            yield number, None, wrapped
            return
        if page_obj.error is not None:
            yield number, None, page_obj.error
            continue
        try:
            page = pdfplumber.page.Page(pdf, page_obj, page_number=number, initial_doctop=doctop)
            doctop += float(page.height)
        except Exception as exc:
            yield number, None, exc
            continue
        yield number, page, None


def _failed_scan(number: int, exc: BaseException) -> PageScan:
    return PageScan(
        number=number,
        failure=f"page could not be read: {type(exc).__name__}: {exc}",
        error=exc,
    )



def read_pdf(data: bytes, params: ExtractParams) -> ReadResult:
    warnings: list[str] = []
    outline: list[OutlineEntry] = []
    meta_title = ""
    count: int | None = None
    pdfium_error = ""
    try:
        count, meta_title, outline = _pdfium_facts(data)
    except Exception as exc:
        if _is_password_error(exc):
            raise DocumentFailure("password protected", exc) from exc
        pdfium_error = _pdfium_message(exc)

    if count is not None and count > params.max_pages:
        raise DocumentFailure(f"too many pages: {count} over the limit of {params.max_pages}")

    try:
        pdf = pdfplumber.open(io.BytesIO(data))
    except Exception as exc:
        if _is_password_error(exc):
            raise DocumentFailure("password protected", exc) from exc
        raise _unreadable(data, pdfium_error, exc) from exc

    scans: list[PageScan] = []
    stopped: BaseException | None = None
    # No `with pdf:` on purpose: pdfplumber's close() walks all pages again and would
    # raise for the broken one; the document lives in memory, so nothing leaks.
    if count is None:
        # PDFium could not open the file: count pdfminer's pages for the guard.
        try:
            count = sum(1 for _ in _PageOrError.create_pages(pdf.doc))
        except Exception as exc:
            raise _unreadable(data, pdfium_error, exc) from exc
        if not count:
            raise DocumentFailure(f"unreadable PDF: no pages{_truncation_hint(data)}")
        warnings.append(f"read with pdfminer only ({pdfium_error}); outline not used")
        if count > params.max_pages:
            raise DocumentFailure(
                f"too many pages: {count} over the limit of {params.max_pages}"
            )
    for number, page, error in _pages(pdf):
        if isinstance(error, _PageTreeError):
            stopped = error.__cause__
            break
        if page is None:
            scans.append(_failed_scan(number, error))
            continue
        try:
            scans.append(scan_page(page, number))
        except Exception as exc:
            scans.append(_failed_scan(number, exc))
        finally:
            page.close()  # drop the page's parsed objects; memory stays flat

    found = len(scans)
    if found < count:
        # PDFium counted pages that pdfminer could not reach: each still gets a unit.
        why = f"{type(stopped).__name__}: {stopped}" if stopped else "page tree ends early"
        for number in range(found + 1, count + 1):
            scans.append(PageScan(
                number=number,
                failure=f"page could not be read: pdfminer found only {found} of "
                f"{count} pages ({why})",
                error=stopped,
            ))
    elif found > count:
        warnings.append(f"PDFium counts {count} pages, pdfminer {found}")
        count = found

    drop_running_lines(scans)
    classify_headings(scans, params.pdf_heading_ratio, outline)

    parts_out: list[PagePart] = []
    for scan in scans:
        part = PagePart(page=scan.number, warnings=scan.warnings,
                        failure=scan.failure, error=scan.error)
        if not scan.failure:
            try:
                part.blocks = page_blocks(scan)
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
