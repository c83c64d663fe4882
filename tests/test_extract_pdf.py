"""PDF extraction on PDFs built here with reportlab (text, tables, outline, damage)."""

from __future__ import annotations

import io
import re

import pytest
from PIL import Image
from reportlab.lib import pdfencrypt
from reportlab.lib.pagesizes import A4
from reportlab.lib.utils import ImageReader
from reportlab.pdfgen import canvas

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.pdf import NO_UNICODE, SCANNED
from thresher.steps.spec import StepContext
from thresher.steps.units import BLOCK_SEP, CODE, DOCUMENT_LOCATOR, FAILED, HEADING, OK, PARAGRAPH, TABLE, Source

W, H = A4


def run(data: bytes, name: str = "handbook.pdf", **params):
    source = Source(doc_id="d", source_path=f"policies/{name}", data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


def kinds(page):
    return [(b.kind, b.level, b.text) for b in page.blocks]


def draw_table(c, rows, x0s, top, row_h=18):
    for r, row in enumerate(rows):
        for j, cell in enumerate(row):
            c.drawString(x0s[j] + 4, top - r * row_h - 13, cell)
    for r in range(len(rows) + 1):
        c.line(x0s[0], top - r * row_h, x0s[-1], top - r * row_h)
    for x in x0s:
        c.line(x, top, x, top - len(rows) * row_h)
    return top - len(rows) * row_h


def lending_pdf(encrypt=None, outline=False, title="Quillfern Lending Rules") -> bytes:
    """Two pages: a 20 pt heading, a hyphenated paragraph, a ruled table; a 14 pt heading."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4, encrypt=encrypt)
    c.setTitle(title)
    c.setFont("Helvetica-Bold", 20)
    c.drawString(72, H - 72, "Lending Rules")
    if outline:
        c.bookmarkPage("rules")
        c.addOutlineEntry("Lending Rules", "rules", level=0)
    c.setFont("Helvetica", 10)
    y = H - 100
    for line in (
        "Members may borrow up to six items at a time. Loans run for",
        "three weeks and can be re-",
        "newed twice online or at any branch desk.",
    ):
        c.drawString(72, y, line)
        y -= 12
    y -= 8
    c.drawString(72, y, "Film loans are shorter than book loans.")
    bottom = draw_table(
        c,
        [["Item", "Loan period", "Renewals"], ["Book", "21 days", "2"], ["Film", "7 days", "1"]],
        [72, 200, 330, 460],
        y - 20,
    )
    c.drawString(72, bottom - 30, "Late returns pause borrowing until the item is back.")
    c.showPage()
    c.setFont("Helvetica-Bold", 14)
    c.drawString(72, H - 72, "Fees and Renewals")
    if outline:
        c.bookmarkPage("fees")
        c.addOutlineEntry("Fees and Renewals", "fees", level=1)
    c.setFont("Helvetica", 10)
    c.drawString(72, H - 100, "There are no fees for members of the cooperative.")
    c.showPage()
    c.save()
    return buf.getvalue()


def test_heading_paragraph_and_table_in_reading_order():
    pages = run(lending_pdf())
    assert [p.locator for p in pages] == ["page/1", "page/2"]
    assert [p.page for p in pages] == [1, 2]
    first = pages[0]
    assert first.status == OK and first.format == "pdf"
    assert kinds(first) == [
        (HEADING, 1, "Lending Rules"),
        # the hyphenated "re-" + "newed" is joined; the three lines are one paragraph
        (PARAGRAPH, 0, "Members may borrow up to six items at a time. Loans run for three "
                       "weeks and can be renewed twice online or at any branch desk."),
        (PARAGRAPH, 0, "Film loans are shorter than book loans."),
        (TABLE, 0, "Item | Loan period | Renewals\nBook | 21 days | 2\nFilm | 7 days | 1"),
        (PARAGRAPH, 0, "Late returns pause borrowing until the item is back."),
    ]
    # The table's words appear only in the table block.
    running = " ".join(b.text for b in first.blocks if b.kind != TABLE)
    assert "21 days" not in running and "Renewals" not in running
    table = next(b for b in first.blocks if b.kind == TABLE)
    assert first.payload["table_share"] == pytest.approx(len(table.text) / len(first.text))
    # 14 pt is the second-largest heading style of the document: level 2.
    assert kinds(pages[1])[0] == (HEADING, 2, "Fees and Renewals")
    assert pages[1].payload["page_count"] == 2
    assert first.payload["method"] == "text-layer" and first.payload["encoding"] == ""
    assert first.payload["word_count"] == len(first.text.split())


def test_title_from_metadata_else_first_heading():
    assert run(lending_pdf())[0].title == "Quillfern Lending Rules"
    # reportlab writes "untitled" when no title is set: that is no title.
    assert {p.title for p in run(lending_pdf(title="untitled"))} == {"Lending Rules"}


def outline_levels_pdf() -> bytes:
    """Three headings all in one 16 pt bold style; the outline says their depths."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    y = H - 72
    for key, text, level in (("a", "Branch Network", 0), ("b", "Opening Hours", 1),
                             ("c", "Holiday Closures", 2)):
        c.setFont("Helvetica-Bold", 16)
        c.drawString(72, y, text)
        c.bookmarkHorizontalAbsolute(key, y + 20)
        c.addOutlineEntry(text, key, level=level)
        c.setFont("Helvetica", 10)
        c.drawString(72, y - 24, f"Body text under {text.lower()} for the branches.")
        y -= 80
    # An outline entry whose text is set at body size: promoted to a heading.
    c.drawString(72, y, "Contact Points")
    c.bookmarkHorizontalAbsolute("d", y + 12)
    c.addOutlineEntry("Contact Points", "d", level=1)
    c.drawString(72, y - 14, "Each branch has a front desk and a phone line for members.")
    c.showPage()
    c.save()
    return buf.getvalue()


def test_outline_gives_heading_levels():
    page = run(outline_levels_pdf())[0]
    headings = [(b.level, b.text) for b in page.blocks if b.kind == HEADING]
    assert headings == [
        (1, "Branch Network"),
        (2, "Opening Hours"),
        (3, "Holiday Closures"),
        (2, "Contact Points"),
    ]


def test_outline_levels_match_the_outline_of_the_lending_pdf():
    pages = run(lending_pdf(outline=True))
    assert kinds(pages[0])[0] == (HEADING, 1, "Lending Rules")
    assert kinds(pages[1])[0] == (HEADING, 2, "Fees and Renewals")


def sizes_pdf(ratio_probe: float = 11.0) -> bytes:
    """Headings at 22, 16 and 13 pt and bold 10 pt over two-line 10 pt paragraphs."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    y = H - 72
    for font, size, text in (
        ("Helvetica", 22, "Volunteer Guide"),
        ("Helvetica", 10, "Volunteers keep the reading rooms open on weekends|and help with events."),
        ("Helvetica", 16, "Shifts"),
        ("Helvetica", 10, "A shift lasts three hours and starts at the branch|front desk."),
        ("Helvetica", 13, "Swapping a shift"),
        ("Helvetica", 10, "Post the swap on the board at least two days|ahead of the shift."),
        ("Helvetica-Bold", 10, "Keys and alarms"),
        ("Helvetica", 10, "The duty coordinator holds the keys and the alarm|code for the day."),
        ("Helvetica", ratio_probe, "Slightly larger line that is body text, not a heading."),
        ("Helvetica-Bold", 10, "Bold sentence that ends with a full stop."),
    ):
        c.setFont(font, size)
        for line in text.split("|"):
            c.drawString(72, y, line)
            y -= 1.2 * size
        y -= 10  # paragraph spacing
    c.showPage()
    c.save()
    return buf.getvalue()


def test_font_size_ranks_give_levels_and_bold_short_lines_are_headings():
    page = run(sizes_pdf())[0]
    headings = [(b.level, b.text) for b in page.blocks if b.kind == HEADING]
    assert headings == [
        (1, "Volunteer Guide"),
        (2, "Shifts"),
        (3, "Swapping a shift"),
        (4, "Keys and alarms"),  # bold at body size ranks below every larger size
    ]
    texts = [b.text for b in page.blocks if b.kind == PARAGRAPH]
    # 11 pt is 1.1 x the 10 pt body: below the 1.15 ratio, so body text.
    assert "Slightly larger line that is body text, not a heading." in texts
    # Bold but ending like a sentence: body text.
    assert "Bold sentence that ends with a full stop." in texts


def test_heading_ratio_parameter_is_used():
    page = run(sizes_pdf(), pdf_heading_ratio=1.05)[0]
    headings = [b.text for b in page.blocks if b.kind == HEADING]
    assert "Slightly larger line that is body text, not a heading." in headings


def running_footer_pdf(pages: int = 4) -> bytes:
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    for n in range(1, pages + 1):
        c.setFont("Helvetica", 8)
        c.drawString(72, H - 30, "Quillfern Library Cooperative - Branch Operations")
        c.drawString(W - 100, 30, f"Page {n} of {pages}")
        c.setFont("Helvetica", 10)
        c.drawString(72, H - 100, f"Section {n} explains how the branches handle task {n * 7}.")
        c.showPage()
    c.save()
    return buf.getvalue()


def test_running_headers_and_footers_are_dropped_with_a_warning():
    pages = run(running_footer_pdf())
    assert len(pages) == 4
    for n, page in enumerate(pages, start=1):
        assert page.text == f"Section {n} explains how the branches handle task {n * 7}."
        assert any(
            "Quillfern Library Cooperative - Branch Operations" in w and f"Page {n} of 4" in w
            for w in page.warnings
        ), page.warnings


def test_two_pages_with_the_same_footer_lose_it_and_one_page_keeps_it():
    pages = run(running_footer_pdf(pages=2))
    assert [p.text for p in pages] == [
        "Section 1 explains how the branches handle task 7.",
        "Section 2 explains how the branches handle task 14.",
    ]
    (single,) = run(running_footer_pdf(pages=1))
    assert "Page 1 of 1" in single.text
    assert not any("header/footer" in w for w in single.warnings)


def test_a_margin_line_that_changes_from_page_to_page_is_kept():
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    for chapter in ("Opening the branch", "Serving patrons", "Closing the branch"):
        c.setFont("Helvetica", 8)
        c.drawString(72, H - 30, f"Chapter: {chapter}")
        c.setFont("Helvetica", 10)
        c.drawString(72, H - 100, f"Body of the chapter about {chapter.lower()}.")
        c.showPage()
    c.save()
    pages = run(buf.getvalue())
    assert [p.text.split("\n\n")[0] for p in pages] == [
        "Chapter: Opening the branch", "Chapter: Serving patrons", "Chapter: Closing the branch"]


def scan_and_text_pdf() -> bytes:
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica", 10)
    c.drawString(72, H - 72, "Receipts are filed by month.")
    c.showPage()
    image = Image.new("RGB", (300, 400), "white")
    c.drawImage(ImageReader(image), 50, 100, W - 100, H - 200)
    c.showPage()
    c.setFont("Helvetica", 10)
    c.drawString(72, H - 72, "Scanned receipts go to the finance folder.")
    c.showPage()
    c.save()
    return buf.getvalue()


def test_image_only_page_fails_alone_with_the_scan_reason():
    pages = run(scan_and_text_pdf(), name="receipts.pdf")
    assert [p.status for p in pages] == [OK, FAILED, OK]
    scan = pages[1]
    assert scan.reason == SCANNED == "no text layer (scanned page); OCR is not enabled"
    assert scan.locator == "page/2" and scan.page == 2 and scan.blocks == []
    assert scan.payload["char_count"] == 0 and scan.payload["page_count"] == 3
    assert pages[2].text == "Scanned receipts go to the finance folder."


def test_blank_page_is_ok_and_empty_with_a_warning():
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.showPage()
    c.save()
    (page,) = run(buf.getvalue())
    assert page.status == OK and page.blocks == []
    assert any("blank page" in w for w in page.warnings)


def broken_mediabox_pdf() -> bytes:
    """Three pages; the second page's MediaBox holds a name instead of a number."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4, pageCompression=0)
    for text in ("Page one is fine.", "Page two has a broken box.", "Page three is fine."):
        c.setFont("Helvetica", 12)
        c.drawString(72, 700, text)
        c.showPage()
    c.save()
    data = buf.getvalue()
    # Find the content stream that draws page two, then the page object that uses it.
    at = data.index(b"(Page two has a broken box.)")
    stream_obj = re.findall(rb"(\d+) 0 obj", data[:at])[-1]
    good = b"/Contents " + stream_obj + b" 0 R /MediaBox [ 0 0 595.2756 841.8898 ]"
    assert data.count(good) == 1
    return data.replace(good, b"/Contents " + stream_obj + b" 0 R /MediaBox [ 0 0 /Bad5.2756 841.8898 ]")


def test_a_broken_media_box_does_not_cost_the_page():
    # PDFium reads a page whose MediaBox holds a name where a number belongs (pdfminer
    # gave up on that page); the page keeps its text.
    pages = run(broken_mediabox_pdf())
    assert [(p.status, p.text) for p in pages] == [
        (OK, "Page one is fine."), (OK, "Page two has a broken box."), (OK, "Page three is fine.")]


def page_tree_with_a_bad_kid() -> bytes:
    """Three pages in the page tree; the second entry is an array, not a page."""
    def page(contents: int) -> bytes:
        return (b"<< /Type /Page /Parent 2 0 R /MediaBox [0 0 595 842] "
                b"/Resources << /Font << /F1 9 0 R >> >> /Contents %d 0 R >>" % contents)

    def content(text: bytes) -> bytes:
        ops = b"BT /F1 12 Tf 72 700 Td (%s) Tj ET" % text
        return b"<< /Length %d >>\nstream\n" % len(ops) + ops + b"\nendstream"

    return handmade_pdf([
        b"<< /Type /Catalog /Pages 2 0 R >>",
        b"<< /Type /Pages /Kids [3 0 R 4 0 R 5 0 R] /Count 3 >>",
        page(6), b"[1 2 3]", page(7),
        content(b"Page one is fine."), content(b"Page three is fine."), b"<< >>",
        b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica >>",
    ])


def test_a_broken_page_fails_alone_with_type_and_traceback():
    pages = run(page_tree_with_a_bad_kid())
    assert [p.status for p in pages] == [OK, FAILED, OK]
    assert pages[0].text == "Page one is fine."
    assert pages[2].text == "Page three is fine."
    bad = pages[1]
    assert bad.locator == "page/2"
    assert bad.reason == "page could not be read: PdfiumError: Failed to load page."
    assert bad.error_type == "PdfiumError"
    assert "Traceback" in bad.traceback


def test_password_protected():
    (page,) = run(lending_pdf(encrypt=pdfencrypt.StandardEncryption("members-only", ownerPassword="x")))
    assert page.status == FAILED and page.reason == "password protected"
    assert page.locator == DOCUMENT_LOCATOR and page.page is None and page.blocks == []


def test_owner_password_only_opens_normally():
    # An empty user password with restrictions set by the owner: readers open it.
    pages = run(lending_pdf(encrypt=pdfencrypt.StandardEncryption("", ownerPassword="owner", canCopy=0)))
    assert [p.status for p in pages] == [OK, OK]
    assert pages[0].blocks[0].text == "Lending Rules"
    # pdfplumber, which reads the ruled table, opens it with the empty password too.
    assert [b.text for b in pages[0].blocks if b.kind == TABLE] == [
        "Item | Loan period | Renewals\nBook | 21 days | 2\nFilm | 7 days | 1"]


def test_truncated_pdf_reports_the_parsers_messages():
    data = lending_pdf()
    (page,) = run(data[: len(data) // 2])
    assert page.status == FAILED and page.locator == DOCUMENT_LOCATOR
    assert page.reason == (
        "unreadable PDF: PDFium: Data format error; pdfminer: Unexpected EOF "
        "(no %%EOF marker at the end: the file looks truncated)"
    )
    assert page.error_type  # the pdfminer exception is kept for the reviewer


def test_the_cycle_collector_is_left_as_the_reader_found_it():
    # The reader pauses Python's cycle collector while it reads (pdf.read_pdf: speed);
    # leaving it off would let every later reference cycle of the run pile up.
    import gc

    assert gc.isenabled()
    assert [p.status for p in run(lending_pdf())] == [OK, OK]
    assert gc.isenabled()
    data = lending_pdf()
    assert run(data[: len(data) // 2])[0].status == FAILED  # a document that fails
    assert gc.isenabled()
    gc.disable()  # a caller that turned it off keeps it off
    try:
        run(lending_pdf())
        assert not gc.isenabled()
    finally:
        gc.enable()


def test_too_many_pages():
    (page,) = run(running_footer_pdf(pages=3), max_pages=2)
    assert page.status == FAILED and page.reason == "too many pages: 3 over the limit of 2"


def test_bullets_become_item_lines_and_framed_boxes_stay_text():
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica", 10)
    c.drawString(72, H - 72, "Bring to the volunteer induction:")
    # reportlab writes "•" as WinAnsi code 127, an unused code that PDF readers show as
    # a bullet (pdftotext prints "•" for this file too).
    c.drawString(72, H - 86, "\u2022 a photo ID,")
    c.drawString(72, H - 98, "\u2013 your shift preferences and the signed volunteer")
    c.drawString(82, H - 110, "agreement.")
    # A single framed note: a 1 x 1 "grid" is not a table.
    c.rect(70, H - 170, 300, 30)
    c.drawString(76, H - 160, "Note: inductions start at ten sharp.")
    c.showPage()
    c.save()
    (page,) = run(buf.getvalue())
    assert kinds(page) == [
        # The list stays with its lead-in line; each bullet starts an item line.
        (PARAGRAPH, 0, "Bring to the volunteer induction:\n- a photo ID,\n"
                       "- your shift preferences and the signed volunteer agreement."),
        (PARAGRAPH, 0, "Note: inductions start at ten sharp."),
    ]


def test_first_line_indent_starts_a_paragraph():
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Times-Roman", 10)
    lines = [
        (90, "The reading room opens at nine. Quiet study is kept"),
        (72, "in the east wing all day."),
        (90, "The children's corner hosts story time on Saturdays"),
        (72, "at eleven, and the craft table stays open until noon."),
    ]
    y = H - 72
    for x, text in lines:
        c.drawString(x, y, text)
        y -= 12
    c.showPage()
    c.save()
    (page,) = run(buf.getvalue())
    assert [b.text for b in page.blocks] == [
        "The reading room opens at nine. Quiet study is kept in the east wing all day.",
        "The children's corner hosts story time on Saturdays at eleven, and the craft table "
        "stays open until noon.",
    ]


def test_no_block_holds_the_block_separator():
    for data in (lending_pdf(), sizes_pdf(), scan_and_text_pdf(), running_footer_pdf()):
        for page in run(data):
            for block in page.blocks:
                assert BLOCK_SEP not in block.text and block.text == block.text.strip()
                assert block.kind != CODE


def handmade_pdf(objects: list[bytes]) -> bytes:
    """A PDF from object bodies (object 1 is the catalog), with a correct xref table."""
    out = io.BytesIO()
    out.write(b"%PDF-1.4\n")
    offsets = []
    for number, body in enumerate(objects, start=1):
        offsets.append(out.tell())
        out.write(b"%d 0 obj\n" % number + body + b"\nendobj\n")
    xref = out.tell()
    out.write(b"xref\n0 %d\n0000000000 65535 f \n" % (len(objects) + 1))
    for offset in offsets:
        out.write(b"%010d 00000 n \n" % offset)
    out.write(b"trailer\n<< /Size %d /Root 1 0 R >>\nstartxref\n%d\n%%%%EOF\n" % (len(objects) + 1, xref))
    return out.getvalue()


def test_glyph_ids_without_unicode_mapping_fail_the_page():
    # A Type0 font with Identity-H encoding and no ToUnicode map: the text layer holds
    # glyph numbers only (poppler's pdftotext also prints control bytes for it).
    content = b"BT /F1 12 Tf 72 700 Td <0012001300140015001600170018> Tj ET"
    data = handmade_pdf([
        b"<< /Type /Catalog /Pages 2 0 R >>",
        b"<< /Type /Pages /Kids [3 0 R] /Count 1 >>",
        b"<< /Type /Page /Parent 2 0 R /MediaBox [0 0 595 842] "
        b"/Resources << /Font << /F1 4 0 R >> >> /Contents 6 0 R >>",
        b"<< /Type /Font /Subtype /Type0 /BaseFont /QFGlyphs /Encoding /Identity-H "
        b"/DescendantFonts [5 0 R] >>",
        b"<< /Type /Font /Subtype /CIDFontType2 /BaseFont /QFGlyphs /CIDSystemInfo "
        b"<< /Registry (Adobe) /Ordering (Identity) /Supplement 0 >> /DW 600 >>",
        b"<< /Length %d >>\nstream\n" % len(content) + content + b"\nendstream",
    ])
    (page,) = run(data)
    assert page.status == FAILED and page.locator == "page/1"
    assert page.reason == NO_UNICODE == (
        "text layer has no Unicode mapping (glyph ids only); OCR is not enabled"
    )


def test_pdf_header_not_at_byte_zero_is_still_a_pdf():
    # Readers accept junk before "%PDF-" within the first 1024 bytes (PDF Reference 1.7,
    # appendix H implementation notes; from memory). Both parsers here do.
    data = b"\r\n" * 10 + lending_pdf()
    pages = run(data, name="lending.bin")
    assert pages[0].format == "pdf"
