"""The PDFium text layer reader (steps/extract/pdf_text.py) and line building
(pdf_layout.make_lines) on real pages: Debian documentation PDFs (zlib1g-dev's CRC
paper: ruled tables, superscripts; libtasn1-doc's manual: a two-column index) and the
demo drive's handbook (ruled tables).

The reader calls PDFium through plain-integer handles (`pdf_text._own`), its hottest
calls without ctypes' argument conversion (`pdf_text._BARE`); a pypdfium2 build without
its library handle goes through pypdfium2's public bindings instead
(`pdf_text._adapted`). Both routes must read the same page. make_lines computes lines
with numpy over the page, from the reader's word arrays or from the words alone; it
must give the lines the rule in pdf_layout's docstring gives when applied word by word
(written out plainly below)."""

from __future__ import annotations

import ctypes
import gzip
from pathlib import Path

import pypdfium2 as pdfium
import pypdfium2.raw as raw
import pytest

from thresher.steps.extract import pdf_layout, pdf_text

REPO = Path(__file__).resolve().parents[1]
CRC = "/usr/share/doc/zlib1g-dev/crc-doc.1.0.pdf.gz"
TASN1 = "/usr/share/doc/libtasn1-doc/libtasn1.pdf"
HANDBOOK = str(REPO / "sample_inputs" / "operations" / "branch-operations-handbook.pdf")


def _doc(path: str) -> pdfium.PdfDocument:
    if not Path(path).exists():
        pytest.fail(f"needs {path}: run `make system-deps`")
    data = Path(path).read_bytes()
    return pdfium.PdfDocument(gzip.decompress(data) if path.endswith(".gz") else data)


def _pages(path: str, first: int = 0) -> list[pdf_text.PageText]:
    doc = _doc(path)
    try:
        with pdf_text.LOCK:
            return [pdf_text.read_page(doc, i) for i in range(first, len(doc))]
    finally:
        doc.close()


@pytest.mark.parametrize("path, first", [(CRC, 20), (HANDBOOK, 0)])  # the CRC paper's tables: pages 25-29
def test_public_bindings_read_the_same_page(path, first, monkeypatch):
    fast = _pages(path, first)
    assert any(p.ruled and p.edges for p in fast) and sum(len(p.words) for p in fast) > 500
    swapped = 0
    for name, fn in list(vars(pdf_text).items()):
        if isinstance(fn, ctypes._CFuncPtr):  # one of _own's plain-integer functions
            public = getattr(raw, fn.__name__)
            monkeypatch.setattr(pdf_text, name, pdf_text._adapted(public, fn.argtypes, fn.restype))
            swapped += 1
    assert swapped >= 20
    monkeypatch.setattr(pdf_text, "_BARE", None)  # a build without the handle has no bare calls either
    assert _pages(path, first) == fast


def _lines_word_by_word(words: list[pdf_text.Word]) -> list[pdf_layout.Line]:
    """pdf_layout's line rule applied one word at a time (the reference)."""
    upright = sorted((w for w in words if w.upright and w.text.strip()),
                     key=lambda w: ((w.top + w.bottom) / 2, w.x0))
    groups: list[list[pdf_text.Word]] = []
    centre = height = 0.0
    for w in upright:
        c = (w.top + w.bottom) / 2
        h = max(w.bottom - w.top, 0.1)
        if groups and abs(c - centre) <= 0.35 * max(h, height):
            groups[-1].append(w)
            continue
        groups.append([w])
        centre, height = c, h
    lines = sorted((pdf_layout.line_from(g) for g in groups), key=lambda ln: (ln.top, ln.x0))
    return lines + [pdf_layout.line_from([w]) for w in words if not w.upright and w.text.strip()]


@pytest.mark.parametrize("path", [CRC, TASN1])
def test_lines_are_the_word_by_word_rule(path):
    lines = []
    for page in _pages(path):
        got = pdf_layout.make_lines(page.words, page.columns)  # the reader's arrays
        assert got == _lines_word_by_word(page.words)
        assert pdf_layout.make_lines(page.words) == got  # the words alone (pdfminer's route)
        lines += got
    assert len(lines) > 1000
    # Lines of several sizes (the size most characters have decides) occur in both.
    assert sum(1 for ln in lines if len({w.size for w in ln.words}) > 1) > 40
    if path == CRC:  # and pieces that touch (superscripts) join without a space
        assert sum(1 for ln in lines if len(ln.text.split()) < len(ln.words)) > 100
