"""The extract step's contract: its spec, its parameters, and what every page carries."""

from __future__ import annotations

import io
from datetime import datetime, timezone

import docx
import pydantic
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from reportlab.pdfgen import canvas

from thresher.steps.extract import EXTRACT, PAYLOAD_KEYS, ExtractParams, extract
from thresher.steps.spec import StepContext, StepParams
from thresher.steps.units import BLOCK_KINDS, BLOCK_SEP, DOCUMENT_LOCATOR, FAILED, HEADING, OK, SKIPPED, Source


# 2026-01-14 09:30:00 UTC, as the file system would report it.
MTIME = 1768383000.0


def run(data: bytes, path: str):
    source = Source(doc_id="d", source_path=path, data=data, size=len(data), mtime=MTIME)
    return extract(source, ExtractParams(), StepContext())


def small_pdf() -> bytes:
    buf = io.BytesIO()
    c = canvas.Canvas(buf)
    c.setFont("Helvetica-Bold", 18)
    c.drawString(72, 760, "Branch Hours")
    c.setFont("Helvetica", 10)
    c.drawString(72, 730, "Open daily from nine.")
    c.showPage()
    c.save()
    return buf.getvalue()


def small_docx() -> bytes:
    d = docx.Document()
    d.add_heading("Branch Hours", level=1)
    d.add_paragraph("Open daily from nine.")
    buf = io.BytesIO()
    d.save(buf)
    return buf.getvalue()


SAMPLES = {
    "pdf": ("a/hours.pdf", small_pdf()),
    "docx": ("a/hours.docx", small_docx()),
    "html": ("a/hours.html", b"<html><body><h1>Branch Hours</h1><p>Open daily from nine.</p></body></html>"),
    "markdown": ("a/hours.md", b"# Branch Hours\n\nOpen daily from nine.\n"),
    "text": ("a/hours.txt", b"Branch Hours\n============\n\nOpen daily from nine.\n"),
}
METHODS = {"pdf": "text-layer", "docx": "docx", "html": "html", "markdown": "markdown", "text": "plain"}


def test_spec_names_the_step():
    assert EXTRACT.name == "extract" and EXTRACT.version == "7"
    assert (EXTRACT.consumes, EXTRACT.produces, EXTRACT.scope) == ("source", "pages", "document")
    assert EXTRACT.params is ExtractParams and EXTRACT.run is extract
    assert EXTRACT.summary


def test_params_defaults_and_unknown_keys():
    params = ExtractParams()
    assert issubclass(ExtractParams, StepParams)
    assert (params.max_file_mb, params.max_pages, params.pdf_heading_ratio) == (200, 2000, 1.15)
    assert (params.ocr, params.ocr_language, params.ocr_dpi) == (False, "eng", 300)
    assert ExtractParams(ocr_language="eng+deu").ocr_language == "eng+deu"
    with pytest.raises(pydantic.ValidationError):
        ExtractParams(ocr_language="eng; rm -rf")
    with pytest.raises(pydantic.ValidationError):
        ExtractParams(max_pages_typo=3)
    with pytest.raises(pydantic.ValidationError):
        ExtractParams(max_pages=0)
    with pytest.raises(pydantic.ValidationError):
        ExtractParams(pdf_heading_ratio=0.9)


@pytest.mark.parametrize("fmt", sorted(SAMPLES))
def test_every_format_gives_the_same_shape(fmt):
    path, data = SAMPLES[fmt]
    (page,) = run(data, path)
    assert page.status == OK, page.reason
    assert page.format == fmt
    assert page.locator == ("page/1" if fmt == "pdf" else "file")
    assert page.page == (1 if fmt == "pdf" else None)
    assert page.parents == []
    assert page.title == "Branch Hours"
    assert [(b.kind, b.level, b.text) for b in page.blocks] == [
        (HEADING, 1, "Branch Hours"), ("paragraph", 0, "Open daily from nine.")]
    assert tuple(page.payload) == PAYLOAD_KEYS
    assert set(page.payload) == {"method", "page_count", "char_count", "word_count",
                                 "unprintable_share", "table_share", "table_count", "columns",
                                 "removed", "navigation", "layer_problem", "control_bytes", "encoding", "byte_size",
                                 "modified_at", "mail_from", "mail_to", "mail_cc", "mail_date"}
    assert page.payload["byte_size"] == len(data)
    assert page.payload["modified_at"] == datetime(2026, 1, 14, 9, 30, tzinfo=timezone.utc)
    assert page.payload["table_count"] == 0 and page.payload["columns"] == 1
    assert page.payload["removed"] == []
    assert page.payload["method"] == METHODS[fmt]
    assert page.payload["page_count"] == 1
    assert page.payload["char_count"] == len("Branch Hours\n\nOpen daily from nine.")
    assert page.payload["word_count"] == 6
    assert page.payload["unprintable_share"] == 0.0 and page.payload["table_share"] == 0.0
    assert page.payload["encoding"] == ("" if fmt in ("pdf", "docx") else "utf-8")


def test_failed_document_has_the_full_payload_and_no_blocks():
    (page,) = run(b"", "a/empty.md")
    assert page.status == FAILED and page.locator == DOCUMENT_LOCATOR
    assert tuple(page.payload) == PAYLOAD_KEYS
    assert page.payload["char_count"] == 0 and page.blocks == [] and page.parents == []
    assert page.payload["byte_size"] == 0
    assert page.payload["modified_at"] == datetime(2026, 1, 14, 9, 30, tzinfo=timezone.utc)
    assert page.title == "empty"


def test_a_file_over_the_size_limit_still_reports_its_size():
    # The flows layer does not read such a file: the Source carries its size only.
    source = Source(doc_id="d", source_path="big/scan.pdf", data=b"", size=3_500_000, mtime=MTIME)
    (page,) = extract(source, ExtractParams(max_file_mb=1), StepContext())
    assert page.status == FAILED and page.reason.startswith("file too large: 3.5 MB")
    assert page.payload["byte_size"] == 3_500_000


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=3000), st.sampled_from(["x.txt", "x.md", "x.html", "x.pdf", "x.docx", "x"]))
def test_arbitrary_bytes_never_raise_and_keep_the_block_rules(data, name):
    pages = run(data, f"fuzz/{name}")
    assert pages
    for page in pages:
        assert page.status in (OK, FAILED, SKIPPED)
        if page.status == FAILED:
            assert page.reason
        assert tuple(page.payload) == PAYLOAD_KEYS
        assert 0.0 <= page.payload["unprintable_share"] <= 1.0
        assert 0.0 <= page.payload["table_share"] <= 1.0
        for block in page.blocks:
            assert block.kind in BLOCK_KINDS
            assert block.text and BLOCK_SEP not in block.text
            if block.kind == HEADING:
                assert 1 <= block.level <= 6


@settings(max_examples=100, deadline=None)
@given(st.text(max_size=2000), st.sampled_from(["x.txt", "x.md", "x.html"]))
def test_arbitrary_text_keeps_the_block_rules(text, name):
    for page in run(text.encode("utf-8"), f"fuzz/{name}"):
        for block in page.blocks:
            assert block.text and BLOCK_SEP not in block.text
            if block.kind == HEADING:
                assert 1 <= block.level <= 6 and "\n" not in block.text


PDF_BYTES = small_pdf()


@settings(max_examples=80, deadline=None)
@given(st.integers(min_value=8, max_value=len(PDF_BYTES)),
       st.lists(st.tuples(st.integers(min_value=0, max_value=len(PDF_BYTES) - 1),
                          st.integers(min_value=0, max_value=255)), max_size=6))
def test_damaged_pdfs_fail_with_a_reason_instead_of_raising(cut, flips):
    data = bytearray(PDF_BYTES[:cut])
    for at, value in flips:
        if at < len(data):
            data[at] = value
    pages = run(bytes(data), "fuzz/damaged.pdf")
    assert pages
    for page in pages:
        assert page.status in (OK, FAILED, SKIPPED)
        assert page.status == OK or page.reason
        assert tuple(page.payload) == PAYLOAD_KEYS
        assert all(BLOCK_SEP not in b.text for b in page.blocks)
