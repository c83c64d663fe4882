"""Slide decks (.pptx, .odp): one page per slide, title as heading, reading order,
tables, groups, speaker notes, hidden slides.

Outside references: decks other programs wrote (python-pptx's test files, written by
PowerPoint, tests/data/office/README.txt; Debian's presentation template that
LibreOffice ships), LibreOffice Impress (it saves our test deck as .odp, and renders
every deck to PDF) and poppler's pdftotext (Debian poppler-utils), whose text of that
PDF is the reference for the bag-of-words F1.
"""

from __future__ import annotations

import io
import shutil
import subprocess
from pathlib import Path

import pptx
import pytest
from pptx.util import Inches, Pt

from office_files import bag_f1, convert, need
from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, HEADING, OK, PARAGRAPH, TABLE, Source

DATA = Path(__file__).parent / "data" / "office"
DEBIAN_TEMPLATE = Path("/usr/lib/libreoffice/share/template/en-US/presnt/debian-presentation.otp")


def read(data: bytes, name: str, **params):
    source = Source(doc_id="d", source_path=f"decks/{name}", data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


def volunteer_deck() -> bytes:
    deck = pptx.Presentation()
    title_layout, content_layout, blank = deck.slide_layouts[0], deck.slide_layouts[1], deck.slide_layouts[6]
    s1 = deck.slides.add_slide(title_layout)
    s1.shapes.title.text = "Welcome, new volunteers"
    s1.placeholders[1].text = "Quillfern Library Cooperative"
    s2 = deck.slides.add_slide(content_layout)
    s2.shapes.title.text = "Your first shift"
    body = s2.placeholders[1].text_frame
    body.text = "Sign in at the front desk"
    for text, level in (("Collect your badge", 1), ("Check the returns trolley", 0)):
        p = body.add_paragraph()
        p.text, p.level = text, level
    s2.notes_slide.notes_text_frame.text = "Mention the fire exits before anything else."
    s3 = deck.slides.add_slide(blank)
    # Added bottom first: reading order must still be top to bottom.
    low = s3.shapes.add_textbox(Inches(1), Inches(6), Inches(6), Inches(1))
    low.text_frame.text = "Questions go to the duty coordinator."
    table = s3.shapes.add_table(3, 2, Inches(1), Inches(3), Inches(6), Inches(2)).table
    for r, row in enumerate([["Day", "Branch"], ["Saturday", "Lindle Cross"], ["Sunday", "Sorrel Wharf"]]):
        for c, text in enumerate(row):
            table.cell(r, c).text = text
    group = s3.shapes.add_group_shape()
    right = group.shapes.add_textbox(Inches(5), Inches(1), Inches(3), Inches(1))
    right.text_frame.text = "Bring a packed lunch"
    left = group.shapes.add_textbox(Inches(1), Inches(1), Inches(3), Inches(1))
    left.text_frame.text = "Wear the green lanyard"
    s4 = deck.slides.add_slide(content_layout)
    s4.shapes.title.text = "Draft: rota changes"
    s4.placeholders[1].text = "Not decided yet"
    s4._element.set("show", "0")
    buf = io.BytesIO()
    deck.save(buf)
    return buf.getvalue()


EXPECTED = [
    [(HEADING, 1, "Welcome, new volunteers"), (PARAGRAPH, 0, "Quillfern Library Cooperative")],
    [(HEADING, 1, "Your first shift"),
     (PARAGRAPH, 0, "- Sign in at the front desk\n  - Collect your badge\n- Check the returns trolley"),
     (HEADING, 2, "Notes"), (PARAGRAPH, 0, "Mention the fire exits before anything else.")],
    [(PARAGRAPH, 0, "Wear the green lanyard"), (PARAGRAPH, 0, "Bring a packed lunch"),
     (TABLE, 0, "Day | Branch\nSaturday | Lindle Cross\nSunday | Sorrel Wharf"),
     (PARAGRAPH, 0, "Questions go to the duty coordinator.")],
]


def blocks(page):
    return [(b.kind, b.level, b.text) for b in page.blocks]


def test_pptx_slides_titles_lists_groups_tables_notes_and_hidden_slide():
    pages = read(volunteer_deck(), "welcome.pptx")
    assert all(p.status == OK and p.format == "pptx" for p in pages)
    assert [p.page for p in pages] == [1, 2, 3]  # slide 4 is hidden
    assert [blocks(p) for p in pages] == EXPECTED
    assert pages[0].payload["removed"] == [
        {"kind": "slide", "text": "4", "reason": "the slide is hidden"}]
    assert pages[0].payload["page_count"] == 4


def test_notes_can_be_switched_off():
    pages = read(volunteer_deck(), "welcome.pptx", slide_notes=False)
    assert blocks(pages[1]) == EXPECTED[1][:2]


@pytest.fixture(scope="module")
def impress(tmp_path_factory):
    work = tmp_path_factory.mktemp("impress")
    return work, work / "profile"


def test_odp_saved_by_libreoffice_reads_like_the_pptx(impress):
    work, profile = impress
    src = work / "welcome.pptx"
    src.write_bytes(volunteer_deck())
    odp = convert(src, "odp", work / "odp", profile)
    pages = read(odp.read_bytes(), "welcome.odp")
    assert all(p.status == OK and p.format == "odp" for p in pages)
    assert [p.page for p in pages] == [1, 2, 3]
    assert [blocks(p) for p in pages] == EXPECTED
    assert pages[0].payload["removed"] == [
        {"kind": "slide", "text": "4", "reason": "the slide is hidden"}]


def pdftotext(pdf: Path) -> str:
    if shutil.which("pdftotext") is None:
        pytest.fail("needs pdftotext (Debian package poppler-utils): run `make system-deps`")
    return subprocess.run(["pdftotext", "-enc", "UTF-8", str(pdf), "-"], check=True,
                          capture_output=True, text=True).stdout


# Word F1 of our text (notes off: a PDF of slides has none) against pdftotext of the
# PDF LibreOffice renders. Measured (run with -s): test.pptx 1.000, txt-text.pptx
# 1.000, tbl-cell.pptx 0.951, debian-presentation.otp 1.000. tbl-cell is below 1.0
# because its cells are narrow and the PDF breaks words inside them ("margin" /
# "s"), which pdftotext reads as two words. The bound leaves room for other
# LibreOffice versions' line breaking.
REAL_DECKS = ["test.pptx", "txt-text.pptx", "tbl-cell.pptx"]


@pytest.mark.parametrize("name", REAL_DECKS + ["debian-presentation.otp"])
def test_real_decks_against_libreoffices_rendering(impress, name):
    work, profile = impress
    src = need(DEBIAN_TEMPLATE, "libreoffice-common") if name.endswith(".otp") else DATA / name
    pages = read(src.read_bytes(), name, slide_notes=False)
    assert all(p.status == OK for p in pages), [p.reason for p in pages]
    ours = "\n".join(p.text for p in pages)
    pdf = convert(src, "pdf", work / "pdf" / name, profile)
    f1 = bag_f1(ours, pdftotext(pdf))
    print(f"F1 {name}: {f1:.3f}")
    assert f1 >= 0.93, f1


def test_speaker_notes_of_a_deck_powerpoint_wrote():
    pages = read((DATA / "sld-notes.pptx").read_bytes(), "sld-notes.pptx")
    assert blocks(pages[0]) == [(HEADING, 2, "Notes"), (PARAGRAPH, 0, "Notes")]
    assert [blocks(p) for p in read((DATA / "sld-notes.pptx").read_bytes(), "sld-notes.pptx",
                                     slide_notes=False)] == [[], []]


def test_broken_decks_get_their_own_reasons():
    data = volunteer_deck()
    (truncated,) = read(data[: len(data) // 2], "welcome.pptx")
    assert truncated.status == FAILED and truncated.reason.startswith("unreadable PPTX")
    (renamed,) = read(b"%PDF-1.4\n%%EOF", "welcome.pptx")
    assert renamed.status == FAILED and "pptx" not in renamed.reason.lower()
    import zipfile
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("mimetype", "application/vnd.oasis.opendocument.presentation")
    (empty_odp,) = read(buf.getvalue(), "talk.odp")
    assert empty_odp.status == FAILED and empty_odp.reason == (
        "unreadable OpenDocument presentation: no content.xml in the package")
