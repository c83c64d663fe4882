"""Ruled tables from PDFium's ruling lines and words, against pdfplumber's table finder
(the reference: pdfplumber's "lines" strategy, https://github.com/jsvine/pdfplumber,
table.py) on every page with ruling lines of real PDFs: Debian documentation PDFs
(packages debian-policy: the FHS 3.0; zlib1g-dev: the CRC paper, 9 tables; debian-faq:
ruled pages holding no table) and the demo drive's handbook."""

from __future__ import annotations

import gzip
import io
from pathlib import Path

import pdfplumber
import pypdfium2 as pdfium
import pytest

from thresher.steps.extract import pdf_text
from thresher.steps.extract.pdf_grid import find_tables
from thresher.steps.extract.pdf_tables import tables_on

REPO = Path(__file__).resolve().parents[1]
PDFS = {  # name: (path, tables pdfplumber finds there)
    "fhs-3.0.pdf": ("/usr/share/doc/debian-policy/fhs/fhs-3.0.pdf.gz", 2),
    "crc-doc.1.0.pdf": ("/usr/share/doc/zlib1g-dev/crc-doc.1.0.pdf.gz", 9),
    "debian-faq.en.pdf": ("/usr/share/doc/debian/FAQ/debian-faq.en.pdf.gz", 0),
    "branch-operations-handbook.pdf": (str(REPO / "sample_inputs" / "operations" / "branch-operations-handbook.pdf"), 2),
}


def _bytes(path: str) -> bytes:
    if not Path(path).exists():
        pytest.fail(f"needs {path}: run `make system-deps`")
    data = Path(path).read_bytes()
    return gzip.decompress(data) if path.endswith(".gz") else data


def _norm(rows):
    # Without spaces: a superscript footnote mark ("2.08" then a raised "3") is a word of
    # its own for PDFium (its baseline jumps) and runs on in pdfplumber ("2.083").
    return [[None if c is None else "".join(c.split()) for c in row] for row in rows]


def _both(data: bytes):
    """Per ruled page: (page number, PDFium grid tables, pdfplumber tables)."""
    out = []
    doc = pdfium.PdfDocument(data)
    plumber = pdfplumber.open(io.BytesIO(data))
    try:
        for i in range(len(doc)):
            with pdf_text.LOCK:
                facts = pdf_text.read_page(doc, i)
            if not facts.ruled:
                continue
            page = plumber.pages[i]
            try:
                out.append((i + 1, find_tables(facts.edges, facts.words), tables_on(page)))
            finally:
                page.close()
    finally:
        plumber.close()
        doc.close()
    return out


@pytest.mark.parametrize("name", sorted(PDFS))
def test_the_grid_finds_pdfplumbers_tables_with_the_same_cells_and_text(name):
    path, tables = PDFS[name]
    pages = _both(_bytes(path))
    assert pages, "the PDF has pages with ruling lines"
    for number, ours, theirs in pages:
        assert len(ours) == len(theirs), (name, number)
        for a, b in zip(ours, theirs):
            assert a.bbox == pytest.approx(b.bbox, abs=0.5), (name, number)
            assert _norm(a.rows) == _norm(b.rows), (name, number)
    assert sum(len(theirs) for _, _, theirs in pages) == tables
