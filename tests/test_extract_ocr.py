"""OCR of pages without a text layer, with the real Tesseract (Debian tesseract-ocr and
tesseract-ocr-eng; `make ocr` installs them, `make system-deps` too for the tests).

The scanned receipt is the demo drive's (sample_inputs/finance); the words asserted
are ones a person reads in its image. The second page is a text page built here,
rendered to an image and put back into a PDF as a picture, so its words are known.
"""

from __future__ import annotations

import io
import shutil

import pypdfium2 as pdfium
import pytest
from reportlab.lib.pagesizes import A4
from reportlab.lib.utils import ImageReader
from reportlab.pdfgen import canvas

from conftest import SAMPLE
from thresher.steps.extract import pdf_ocr
from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, OK, Source

RECEIPT = SAMPLE / "finance" / "2026-01-14-receipt-stationery-scan.pdf"
W, H = A4


def needs_tesseract() -> None:
    if shutil.which("tesseract") is None:
        pytest.fail("needs Tesseract with English data (Debian tesseract-ocr tesseract-ocr-eng): "
                    "run `make system-deps`")


def run(data: bytes, name: str = "finance/scan.pdf", **params):
    source = Source(doc_id="d", source_path=name, data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


def test_the_scanned_receipt_is_not_read_when_ocr_is_off():
    (page,) = run(RECEIPT.read_bytes())
    assert page.status == FAILED
    assert page.reason == "no text layer (scanned page); OCR is not enabled"


def test_the_scanned_receipt_is_read_with_ocr():
    needs_tesseract()
    (page,) = run(RECEIPT.read_bytes(), ocr=True)
    assert page.status == OK, page.reason
    assert page.payload["method"] == "ocr"
    words = set(page.text.replace(",", " ").split())
    # Printed large and clear on the receipt: the shop, the receipt number, the total.
    for word in ("TIDEWELL", "DAUGHTERS", "Ropewalk", "Lindle", "Receipt", "004817",
                 "TOTAL", "EUR", "67.90", "Quillfern", "Library"):
        assert word in words, (word, page.text)
    assert any(w.startswith("text from OCR (Tesseract ") and "language eng, 300 dpi" in w
               for w in page.warnings), page.warnings


PARAGRAPHS = [
    "Reading room rules for every branch",
    "Please keep phones silent in the reading room and return atlases to the map table.",
    "Ask at the front desk before you photograph rare books from the local history shelves.",
]


def picture_of_text_pdf() -> bytes:
    """Page 1 has a text layer; page 2 is a picture of the same kind of page."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica-Bold", 20)
    c.drawString(72, H - 90, PARAGRAPHS[0])
    c.setFont("Helvetica", 13)
    y = H - 140
    for paragraph in PARAGRAPHS[1:]:
        words = paragraph.split()
        for line in (" ".join(words[:8]), " ".join(words[8:])):  # two lines each
            c.drawString(72, y, line)
            y -= 18
        y -= 24
    c.showPage()
    c.save()
    page = pdfium.PdfDocument(buf.getvalue())[0]
    image = page.render(scale=200 / 72, grayscale=True).to_pil()
    out = io.BytesIO()
    c = canvas.Canvas(out, pagesize=A4)
    c.setFont("Helvetica", 11)
    c.drawString(72, H - 72, "The rules below are posted in every reading room.")
    c.showPage()
    c.drawImage(ImageReader(image), 0, 0, W, H)
    c.showPage()
    c.save()
    return out.getvalue()


def test_a_picture_of_a_page_gives_its_paragraphs_back():
    needs_tesseract()
    pages = run(picture_of_text_pdf(), name="notices/rules.pdf", ocr=True)
    assert [p.status for p in pages] == [OK, OK]
    assert pages[0].payload["method"] == "text-layer"
    assert pages[1].payload["method"] == "ocr"
    assert [b.text for b in pages[1].blocks] == PARAGRAPHS


def test_ocr_that_cannot_run_says_what_is_missing(monkeypatch):
    needs_tesseract()
    # A language whose data is not installed: the real check, no stand-in.
    (page,) = run(RECEIPT.read_bytes(), ocr=True, ocr_language="qfx")
    assert page.status == FAILED
    assert page.reason.startswith(
        "no text layer (scanned page); OCR is not available: tesseract has no language data for qfx")
    assert "eng" in page.reason and "Debian: tesseract-ocr-qfx" in page.reason
    # Without the program (pytesseract pointed at a path where nothing is installed).
    import pytesseract

    monkeypatch.setattr(pytesseract.pytesseract, "tesseract_cmd", "/nonexistent/tesseract")
    monkeypatch.setattr(pdf_ocr, "_languages", None)
    monkeypatch.setattr(pdf_ocr, "_missing", None)
    (page,) = run(RECEIPT.read_bytes(), ocr=True)
    assert page.reason == ("no text layer (scanned page); OCR is not available: "
                           "the tesseract program is not installed (Debian: tesseract-ocr)")
