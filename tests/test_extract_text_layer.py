"""Unreadable text layers: glyphs mapped to the wrong characters.

Outside reference: the reference cards of Debian's debian-refcard package, one card per
language in many scripts, and Tesseract's reading of the same page (tesseract-ocr-hin).
Measured over every card of the package (38, a4 and letter): only the Hindi card,
refcard-hi-a4.pdf, has words mixing scripts (151 Devanagari words with Cyrillic letters
inside, 7 with Armenian); the Greek card has 2 words with a Latin capital (a typing
slip in its source, not a mapping fault), below the bounds.
"""

from __future__ import annotations

import gzip
import re
from pathlib import Path

import pytest

from thresher.steps.extract.step import ExtractParams, extract
from thresher.steps.extract.text_layer import mixed_words, unreadable
from thresher.steps.units import FAILED, OK, Source

CARDS = "/usr/share/doc/debian-refcard/refcard-{}-a4.pdf.gz"
CYRILLIC = re.compile(r"[\u0400-\u04ff]")
DEVANAGARI = re.compile(r"[\u0900-\u097f]")


def _pages(lang: str, **params):
    path = CARDS.format(lang)
    data = gzip.decompress(Path(path).read_bytes())
    return extract(Source(path, path, data, len(data), 0.0), ExtractParams(**params), None)


@pytest.mark.parametrize("lang", ["ru", "el", "ja", "zh_CN"])
def test_good_text_layers_pass(lang):
    pages = _pages(lang)
    assert [p.status for p in pages] == [OK] * len(pages)
    assert all(p.payload["layer_problem"] == "" for p in pages)


def test_the_hindi_card_is_unreadable_with_the_reason():
    pages = _pages("hi")
    assert pages and all(p.status == FAILED for p in pages)
    assert "devanagari" in pages[0].reason and "cyrillic" in pages[0].reason
    assert "OCR is not enabled" in pages[0].reason
    # The judgement has its own column, for `thresher status` to count.
    assert all("cyrillic" in p.payload["layer_problem"] for p in pages)
    assert pages[0].payload["layer_problem"] in pages[0].reason


def test_ocr_reads_the_hindi_card_and_disagrees_with_its_text_layer():
    # The text layer has Cyrillic letters inside Devanagari words; Tesseract reading the
    # rendered page (its top third, to keep the test short) sees Devanagari without
    # them: the text layer is the one at fault.
    import pypdfium2 as pdfium

    from thresher.steps.extract import pdf_ocr

    data = gzip.decompress(Path(CARDS.format("hi")).read_bytes())
    doc = pdfium.PdfDocument(data)
    try:
        page = doc[0]
        layer = page.get_textpage().get_text_range()
        image = page.render(scale=200 / 72, grayscale=True).to_pil()
    finally:
        doc.close()
    top = image.crop((0, 0, image.width, image.height // 3))
    ocr = "\n".join(pdf_ocr.read_image(top, "hin", 120).paragraphs)
    assert len(CYRILLIC.findall(layer)) > 50
    assert len(DEVANAGARI.findall(ocr)) > 200
    assert len(CYRILLIC.findall(ocr)) <= 2


def test_with_ocr_on_the_reason_is_kept():
    # OCR asked for with a language Tesseract lacks: the page still fails, and says both
    # why its text layer was not used and why OCR could not read it.
    pages = _pages("hi", ocr=True, ocr_language="qqq")
    assert pages[0].status == FAILED
    assert "wrong characters" in pages[0].reason and "OCR is not available" in pages[0].reason


def test_rules_on_small_texts():
    assert unreadable("The Quillfern desk opens at nine.") == ""
    assert mixed_words("Quillfern 図書館 と library") == {}
    assert "private-use" in unreadable("Opening hours \ue000\ue001\ue002 daily")
    assert "(cid:N)" in unreadable("(cid:12)(cid:15)(cid:3) (cid:9)")
    assert "wrong characters" in unreadable("бook rеturns аre due")


def test_the_fast_character_classes_match_unicodedata_on_every_code_point():
    # The text-layer judge counts private-use characters with one pattern, and outline
    # titles are compared after removing what str.isalnum() rejects with another: both
    # stand for Python's Unicode database (unicodedata.category "Co", str.isalnum) and
    # must agree with it on every code point of the database this Python ships.
    import sys
    import unicodedata

    from thresher.steps.extract.pdf import _NOT_ALNUM
    from thresher.steps.extract.text_layer import _PRIVATE_USE

    everything = "".join(map(chr, range(sys.maxunicode + 1)))
    assert _NOT_ALNUM.sub("", everything) == "".join(c for c in everything if c.isalnum())
    assert "".join(_PRIVATE_USE.findall(everything)) == "".join(
        c for c in everything if unicodedata.category(c) == "Co")
