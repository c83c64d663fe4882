"""Navigation pages (contents, index, lists of figures/tables) in PDFs.

Outside reference: the PDFs' own outlines (bookmarks), as Debian packages ship them
(debian-faq, libtasn1-doc, fontconfig, shared-mime-info, bzip2-doc). A page is a
contents page by the outline when it comes before the first top-level entry and holds
at least five outline titles; an index page when it lies in a top-level entry titled
"... Index". Every such page must be judged navigation, and no other page.
"""

from __future__ import annotations

import gzip
import re
from pathlib import Path

import pypdfium2 as pdfium
import pytest

from thresher.steps.extract.pdf_navigation import judge_page
from thresher.steps.extract.step import ExtractParams, extract
from thresher.steps.units import DROPPED, OK, Source

PDFS = [
    "/usr/share/doc/debian/FAQ/debian-faq.en.pdf.gz",  # debian-faq
    "/usr/share/doc/libtasn1-doc/libtasn1.pdf",  # libtasn1-doc (two-column Texinfo index)
    "/usr/share/doc/fontconfig/fontconfig-user.pdf.gz",  # fontconfig (no contents)
    "/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",  # shared-mime-info
]


def _read(path: str) -> bytes:
    data = Path(path).read_bytes()
    return gzip.decompress(data) if path.endswith(".gz") else data


def _norm(text: str) -> str:
    return re.sub(r"\W+", "", text.casefold())


def outline_navigation(data: bytes) -> set[int]:
    doc = pdfium.PdfDocument(data)
    try:
        marks = [(m.level, m.get_title() or "", m.get_dest().get_index() + 1)
                 for m in doc.get_toc() if m.get_dest() is not None]
        top = [(title, page) for level, title, page in marks if level == 0]
        body = min(page for _, page in top)
        titles = {_norm(t) for _, t, _ in marks if len(_norm(t)) >= 10}
        out = {n for n in range(1, body)
               if sum(t in _norm(doc[n - 1].get_textpage().get_text_range()) for t in titles) >= 5}
        for k, (title, page) in enumerate(top):
            if title.casefold().endswith("index"):
                nxt = next((p for _, p in top[k + 1:] if p > page), len(doc) + 1)
                out.update(range(page, nxt))
        return out
    finally:
        doc.close()


def _pages(path: str, **params):
    data = _read(path)
    return data, extract(Source(path, path, data, len(data), 0.0), ExtractParams(**params), None)


@pytest.mark.parametrize("path", PDFS)
def test_navigation_pages_match_the_outline(path):
    data, pages = _pages(path, drop_navigation=False)
    judged = {p.page for p in pages if p.payload["navigation"]}
    assert judged == outline_navigation(data)


def test_faq_contents_and_index_are_dropped_by_default():
    _, pages = _pages(PDFS[0])
    dropped = {p.page: p for p in pages if p.status == DROPPED}
    assert sorted(dropped) == [3, 4, 5, 6, 73]
    assert dropped[3].payload["navigation"] == "contents"
    assert dropped[73].payload["navigation"] == "index"
    assert "drop_navigation: false" in dropped[3].reason
    assert all(p.status == OK for p in pages if p.page not in dropped)


def test_chapter_opening_keeps_its_text_and_loses_its_contents_list():
    # bzip2-doc's manual (no outline) opens chapter 3 with its own contents list.
    _, pages = _pages("/usr/share/doc/bzip2/manual.pdf.gz")
    judged = {p.page for p in pages if p.payload["navigation"]}
    assert judged == {3}
    page = next(p for p in pages if p.page == 11)
    assert page.status == OK and "programming interface to libbzip2" in page.text
    assert ". . . . ." not in page.text
    entries = [r for r in page.payload["removed"] if r["kind"] == "contents entry"]
    assert any(r["text"].startswith("3.1. Top-level structure") for r in entries)


CONTENTS = """Contents
1 The Quillfern lending desk . . . . . . . . 1
1.1 Opening hours . . . . . . . . 2
1.2 Loans and renewals . . . . . . . . 4
2 The reading circle . . . . . . . . 7
2.1 Meetings 9
3 Volunteers 12""".splitlines()


def test_contents_and_index_lines():
    assert judge_page(CONTENTS, ["Contents"], 40).kind == "contents"
    index = ["Index", "A", "acquisitions, 4, 17", "archive room, 22", "B",
             "book club, 7-9", "branch hours, 2", "catalogue, 30, 31", "circle, 7"]
    assert judge_page(index, ["Index", "A", "B"], 40).kind == "index"
    assert judge_page(["List of Tables"] + CONTENTS[1:], ["List of Tables"], 40).kind == "tables"


@pytest.mark.parametrize("lines", [
    # A numbered list: the numbers start the lines.
    ["Steps to renew a loan:", "1. Bring the book to the desk", "2. Show your card 12",
     "3. Sign the slip", "4. Take the book home", "5. Return it within 21 days"],
    # A price list: decimals and currency signs.
    ["Quillfern cafe", "Tea 2.50", "Coffee 3.10", "Scone 2.20", "Soup 4.80",
     "Sandwich € 5", "Cake . . . . 3.40"],
    # Ascending prices with leaders: the currency sign tells them from page numbers.
    ["Reading room passes", "Day pass € . . . . 3", "Week pass € . . . . 9",
     "Month pass € . . . . 25", "Season pass € . . . . 60", "Year pass € . . . . 90"],
    # Figures per branch, not in page order, above the page count.
    ["Loans per branch in 2025", "Northbank 1204", "Eastmere 877", "Old Mill 1530",
     "Riverside 412", "Hilltop 990", "Harbour 1402"],
    # Prose.
    ["The reading circle meets on Thursdays in the east room.",
     "Members bring a book they finished in the last month, and the circle",
     "chooses the next title together. Tea is served at 7"],
])
def test_ordinary_lists_are_not_navigation(lines):
    assert judge_page(lines, [lines[0]], 40).kind == ""


def test_lines_without_a_reference_at_their_end_are_not_entries(monkeypatch):
    """The quick check on a line's last three characters (pdf_navigation._TAIL) decides
    nothing the entry patterns would decide otherwise: every line of the Debian FAQ's
    first twelve pages (contents and text) and of libtasn1's two-column index, and
    entry forms written out (another script's digits among them), read the same with
    the check and without it."""
    from thresher.steps.extract import pdf_layout, pdf_navigation, pdf_text

    lines = ["Basics . . . . 12", "Preface . . . . iii", "a . . . 3 b . . . 4 x", "apt-get, 12, 45-47",
             "1.2 Basics 12", "Grundlagen \u0661\u0662", "Prix 12,50", "Kapitel IV", "Seite 4 ."]
    for path, pages in ((PDFS[0], slice(0, 12)), (PDFS[1], slice(-8, None))):  # contents; index
        doc = pdfium.PdfDocument(_read(path))
        try:
            with pdf_text.LOCK:
                for i in range(len(doc))[pages]:
                    lines += [ln.text for ln in pdf_layout.make_lines(pdf_text.read_page(doc, i).words)]
        finally:
            doc.close()
    with_check = [pdf_navigation._entry(ln) for ln in lines]
    monkeypatch.setattr(pdf_navigation, "_TAIL", re.compile(""))  # matches every line
    assert [pdf_navigation._entry(ln) for ln in lines] == with_check
    assert sum(e is not None for e in with_check) > 150  # contents and index entries among them
