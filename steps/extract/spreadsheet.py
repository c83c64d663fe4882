"""Spreadsheets (.xlsx/.xlsm, .xls, .ods), read with python-calamine; one page per sheet.

- Page = the sheet's position among the workbook's sheets (1-based, hidden ones
  counted, so page numbers match the tabs as the workbook lists them); the sheet name
  is the page's level-1 heading.
- Values as the sheet stores what it shows: a formula cell gives its cached result
  (what the program that saved the file computed); a date-formatted number is a date
  ("2026-03-14", with " 09:30" when it has a time of day); whole numbers without
  ".0"; other numbers with up to 15 significant digits (IEEE doubles hold 15 exactly).
  Number formats beyond dates (currency signs, percent, thousands separators) are not
  applied: calamine does not read them.
- The used range only: rows and columns empty everywhere are left out.
- Leading rows that hold a single cell (a title, a note above the table) are
  paragraphs. The table starts at the first row with two or more cells. That row is
  its header when every cell in it is text and at least one row below holds a
  number, date or boolean in a column the header names, or, in a table of text only,
  when the cell lengths say so (csv.Sniffer's length test; see _lengths_vote).
  Otherwise the table gets a header of column letters (A, B, ...), as the program
  shows them, so the split step, which repeats a table's first row on every piece
  of a long table, repeats a header and never a data row.
- Hidden and very hidden sheets, and chart sheets, are left out and listed in the
  first page's `removed`.
- One sheet is held at a time: calamine loads a sheet's cells (not the whole
  workbook) and the rows are turned into text one by one.
"""

from __future__ import annotations

import datetime as dt
import io

from .blocks import (
    DocumentFailure,
    PagePart,
    ReaderInput,
    ReadResult,
    heading_block,
    inline,
    paragraph_block,
    table_block,
)

NAMES = {"xlsx": "XLSX", "xls": "XLS", "ods": "OpenDocument spreadsheet"}


def column_letters(index: int) -> str:
    """0 -> A, 25 -> Z, 26 -> AA (the spreadsheet column names)."""
    name = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        name = chr(65 + rem) + name
    return name


def cell_text(value) -> str:
    if value is None or value == "":
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, dt.datetime):
        if value.time() == dt.time(0, 0):
            return value.date().isoformat()
        return value.isoformat(sep=" ", timespec="seconds").removesuffix(":00")
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, dt.time):
        return value.isoformat(timespec="seconds").removesuffix(":00")
    if isinstance(value, dt.timedelta):
        seconds = int(value.total_seconds())
        sign = "-" if seconds < 0 else ""
        h, rest = divmod(abs(seconds), 3600)
        return f"{sign}{h}:{rest // 60:02d}:{rest % 60:02d}"
    if isinstance(value, float):
        if value.is_integer() and abs(value) < 1e15:
            return str(int(value))
        return f"{value:.15g}"
    return inline(str(value))


def _is_text(value) -> bool:
    return isinstance(value, str) and value.strip() != ""


def _typed(value) -> bool:
    return value is not None and value != "" and not isinstance(value, str)


def sheet_blocks(name: str, rows) -> tuple[list, int]:
    """A sheet's blocks from an iterator of rows of raw values; and its row count."""
    blocks = []
    head = heading_block(name, 1)
    if head:
        blocks.append(head)
    texts: list[list[str]] = []
    header_raw: list | None = None
    header_at = -1
    typed_below = False  # a number/date/boolean below the header in a named column
    count = 0
    for raw in rows:
        count += 1
        row = [cell_text(v) for v in raw]
        filled = sum(1 for c in row if c)
        if header_raw is None:
            if filled == 0:
                continue
            if filled == 1:
                block = paragraph_block(next(c for c in row if c))
                if block:
                    blocks.append(block)
                continue
            header_raw = list(raw)
            header_at = len(texts)
        elif not typed_below:
            typed_below = any(
                _typed(v) and j < len(header_raw) and _is_text(header_raw[j])
                for j, v in enumerate(raw)
            )
        texts.append(row)
    if header_raw is not None:
        width = max(len(r) for r in texts)
        all_text_header = all(_is_text(v) or v in (None, "") for v in header_raw)
        has_header = all_text_header and len(texts) > 1 and (
            typed_below or _lengths_vote(texts[header_at:]) > 0)
        if not has_header:
            # Letters only over columns that hold something (empty ones are dropped).
            used = [j for j in range(width) if any(j < len(r) and r[j] for r in texts)]
            texts.insert(0, [column_letters(j) if j in used else "" for j in range(width)])
        table = table_block(texts)
        if table:
            blocks.append(table)
    return blocks, count


def _lengths_vote(rows: list[list[str]]) -> int:
    """For a table of text only: does the first row look like a header? Each column
    whose cells below all have one length votes for a header when the first row's cell
    has another length, and against when it has the same (csv.Sniffer.has_header's
    length test, Python standard library)."""
    vote = 0
    for j, head in enumerate(rows[0]):
        below = {len(r[j]) for r in rows[1:] if j < len(r) and r[j]}
        if head and len(below) == 1:
            vote += 1 if len(head) not in below else -1
    return vote


def _sheet_kind(meta) -> tuple[bool, str]:
    """(readable, why not) for a sheet's metadata."""
    visible = str(getattr(meta, "visible", "")).lower()
    typ = str(getattr(meta, "typ", "")).lower()
    if "hidden" in visible:
        return False, ("the sheet is very hidden" if "very" in visible else "the sheet is hidden")
    if typ and "worksheet" not in typ:
        return False, f"not a worksheet ({typ.rsplit('.', 1)[-1]})"
    return True, ""


def read_spreadsheet(inp: ReaderInput, fmt: str) -> ReadResult:
    from python_calamine import CalamineWorkbook

    what = NAMES[fmt]
    try:
        workbook = CalamineWorkbook.from_filelike(io.BytesIO(inp.data))
    except Exception as exc:  # calamine raises its own error types for damaged files
        message = str(exc)
        if "password" in message.lower() or "encrypt" in message.lower():
            raise DocumentFailure("password protected", exc) from exc
        raise DocumentFailure(f"unreadable {what}: {type(exc).__name__}: {message}", exc) from exc

    metas = workbook.sheets_metadata
    if len(metas) > inp.params.max_pages:
        raise DocumentFailure(f"too many sheets: {len(metas)} over the limit of "
                              f"{inp.params.max_pages} (max_pages)")
    pages: list[PagePart] = []
    removed: list[dict] = []
    for number, meta in enumerate(metas, start=1):
        readable, why = _sheet_kind(meta)
        if not readable:
            removed.append({"kind": "sheet", "text": meta.name, "reason": why})
            continue
        try:
            sheet = workbook.get_sheet_by_index(number - 1)
            blocks, _rows = sheet_blocks(meta.name, sheet.iter_rows())
        except Exception as exc:  # one damaged sheet fails its page only
            part = PagePart(page=number)
            part.failure = f"unreadable sheet {meta.name!r}: {type(exc).__name__}: {exc}"
            part.error = exc
            pages.append(part)
            continue
        part = PagePart(page=number, blocks=blocks)
        if len(blocks) <= 1:
            part.warnings.append("empty sheet")
        pages.append(part)
    warnings = []
    if removed:
        warnings.append(f"{len(removed)} sheet(s) left out: "
                        + ", ".join(f"{r['text']} ({r['reason']})" for r in removed))
    if not pages:
        raise DocumentFailure(f"no visible worksheet ({len(removed)} sheet(s), all hidden "
                              "or not worksheets)")
    pages[0].removed.extend(removed)
    return ReadResult(format=fmt, method=fmt, pages=pages, page_count=len(metas),
                      warnings=warnings)


def read_xlsx(inp: ReaderInput) -> ReadResult:
    return read_spreadsheet(inp, "xlsx")


def read_xls(inp: ReaderInput) -> ReadResult:
    return read_spreadsheet(inp, "xls")


def read_ods(inp: ReaderInput) -> ReadResult:
    return read_spreadsheet(inp, "ods")
