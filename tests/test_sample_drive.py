"""The demo drive in sample_inputs/ is exactly what tools/make_sample_drive.py makes, and
each awkward file in it is awkward in the way the pipeline's own tests rely on."""

from __future__ import annotations

import difflib
import re
import subprocess
import sys
import zipfile
from collections import Counter
from pathlib import Path

import docx
import pdfplumber
import pypdfium2
import pytest
from pdfminer.pdfdocument import PDFPasswordIncorrect
from pdfplumber.utils.exceptions import PdfminerException

REPO = Path(__file__).resolve().parents[1]
DRIVE = REPO / "sample_inputs"
SCRIPT = REPO / "tools" / "make_sample_drive.py"

HANDBOOK = DRIVE / "operations" / "branch-operations-handbook.pdf"
HANDBOOK_HEADER = "Quillfern Library Cooperative - Branch Operations Handbook"
HR_FILE = DRIVE / "hr" / "salary-review-2026-protected.pdf"
HR_USER_PASSWORD = "kestrel-ledger-7"


def _tree(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in root.rglob("*") if p.is_file()}


def _generate(out: Path) -> subprocess.CompletedProcess:
    # A fresh interpreter, as a user runs it; reportlab keeps process-wide state.
    return subprocess.run(
        [sys.executable, str(SCRIPT), str(out)], capture_output=True, text=True, timeout=120
    )


@pytest.fixture(scope="module")
def fresh(tmp_path_factory):
    out = tmp_path_factory.mktemp("drive")
    proc = _generate(out)
    assert proc.returncode == 0, proc.stderr
    return out, proc.stdout


# --- the generator and the committed drive ---------------------------------------------


def test_committed_drive_is_byte_identical_to_a_fresh_generation(fresh):
    out, _ = fresh
    made, committed = _tree(out), _tree(DRIVE)
    assert sorted(made) == sorted(committed)
    stale = sorted(rel for rel in made if made[rel] != committed[rel])
    assert not stale, "sample_inputs/ differs from the generator for %s; re-run %s" % (stale, SCRIPT)


def test_generator_prints_every_file_with_its_size(fresh):
    out, stdout = fresh
    reported = {}
    for line in stdout.splitlines():
        size, rel = line.split(maxsplit=1)
        reported[rel] = int(size)
    assert reported == {rel: len(data) for rel, data in _tree(out).items()}
    assert 15 <= len(reported) <= 30


def test_generator_replaces_its_old_output_and_refuses_foreign_directories(tmp_path):
    own = tmp_path / "own"
    (own / "policies").mkdir(parents=True)
    (own / "policies" / "lending-policy-2019.pdf").write_bytes(b"left over from an old run")
    assert _generate(own).returncode == 0
    assert not (own / "policies" / "lending-policy-2019.pdf").exists()
    assert (own / "policies" / "lending-policy-2026.pdf").exists()

    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "holiday-photos").mkdir()
    (foreign / "operations").mkdir()
    (foreign / "operations" / "keep-me.txt").write_text("not the generator's")
    proc = _generate(foreign)
    assert proc.returncode != 0
    assert "holiday-photos" in proc.stderr
    assert (foreign / "operations" / "keep-me.txt").read_text() == "not the generator's"


# --- the handbook ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def handbook():
    with pdfplumber.open(HANDBOOK) as pdf:
        pages = [
            (page.extract_text(), page.extract_text_lines(return_chars=True), page.extract_tables())
            for page in pdf.pages
        ]
        yield pdf.metadata, pages


def test_handbook_pages_carry_running_header_and_page_n_of_total(handbook):
    _, pages = handbook
    assert 6 <= len(pages) <= 9
    for number, (text, _, _) in enumerate(pages, start=1):
        lines = text.splitlines()
        assert lines[0] == HANDBOOK_HEADER
        assert lines[-1].endswith("Page %d of %d" % (number, len(pages)))


def test_handbook_has_metadata_title_and_a_few_thousand_words(handbook):
    metadata, pages = handbook
    assert metadata["Title"] == "Branch Operations Handbook"
    assert sum(len(text.split()) for text, _, _ in pages) > 2500


def test_handbook_tables_are_found_from_their_ruling_lines(handbook):
    _, pages = handbook
    tables = [table for _, _, page_tables in pages for table in page_tables]
    by_header = {tuple(table[0]): table for table in tables}
    fines = by_header[("Charge", "Adult", "Child (under 16)", "Notes")]
    assert len(fines) == 8
    assert ["Hold request", "Free", "Free", "Up to 12 active holds per card"] in fines
    hours = by_header[("Branch", "Address", "Monday to Friday", "Saturday", "Sunday")]
    assert [row[0] for row in hours[1:]] == [
        "Quillfern Central", "Tansywell", "Brackenmoor", "Lindle Cross", "Sorrel Wharf"
    ]


def test_handbook_headings_are_bold_larger_and_match_the_outline(handbook):
    _, pages = handbook
    body_size = Counter(
        round(char["size"], 1) for _, lines, _ in pages for line in lines for char in line["chars"]
    ).most_common(1)[0][0]
    rendered = {}  # heading text -> (page index, font size, font name)
    for index, (_, lines, _) in enumerate(pages):
        for line in lines:
            first = line["chars"][0]
            if re.match(r"\d+(\.\d+)? [A-Z]", line["text"]) and first["size"] > body_size:
                rendered[line["text"]] = (index, round(first["size"], 1), first["fontname"])

    outline = [
        (item.level, item.get_title(), item.get_dest().get_index())
        for item in pypdfium2.PdfDocument(HANDBOOK).get_toc()
    ]
    titles = [title for _, title, _ in outline]
    assert titles[:3] == ["1 Opening the branch", "1.1 Keys and alarms", "1.2 Morning checks"]
    assert "2.3 Fines and charges" in titles and len(titles) >= 20
    # Every bookmark points at the page where its heading is drawn, and nothing drawn as
    # a numbered heading is missing from the outline.
    assert sorted(rendered) == sorted(titles)
    for level, title, page_index in outline:
        page, size, font = rendered[title]
        assert page == page_index, title
        assert "Bold" in font, title
        assert size == (16.0 if level == 0 else 12.5), title
    assert body_size == 10.5


def test_archive_holds_a_byte_identical_copy_of_the_handbook():
    assert (DRIVE / "archive" / "2025" / "branch-operations-handbook.pdf").read_bytes() == HANDBOOK.read_bytes()


# --- the two lending policy revisions -----------------------------------------------------


def _pdf_text(path: Path, **kwargs) -> tuple[int, str]:
    with pdfplumber.open(path, **kwargs) as pdf:
        return len(pdf.pages), "\n".join(page.extract_text() for page in pdf.pages)


def test_lending_policy_revisions_differ_only_in_a_few_paragraphs():
    pages_2025, old = _pdf_text(DRIVE / "policies" / "lending-policy-2025.pdf")
    pages_2026, new = _pdf_text(DRIVE / "policies" / "lending-policy-2026.pdf")
    assert 2 <= pages_2025 <= 3 and 2 <= pages_2026 <= 3
    old_words, new_words = old.split(), new.split()
    assert difflib.SequenceMatcher(None, old_words, new_words, autojunk=False).ratio() > 0.85
    flat_old, flat_new = " ".join(old_words), " ".join(new_words)
    assert "charged at half the adult rate" in flat_old and "are no longer fined" not in flat_old
    assert "are no longer fined" in flat_new and "charged at half the adult rate" not in flat_new
    assert "e-reader" not in flat_old and "borrow one e-reader at a time" in flat_new


# --- awkward files ---------------------------------------------------------------------


def test_protected_pdf_needs_its_password():
    with pytest.raises(pypdfium2.PdfiumError, match="(?i)password"):
        pypdfium2.PdfDocument(HR_FILE)
    with pytest.raises(PdfminerException) as caught:
        pdfplumber.open(HR_FILE)
    assert isinstance(caught.value.args[0], PDFPasswordIncorrect)

    assert len(pypdfium2.PdfDocument(HR_FILE, password=HR_USER_PASSWORD)) == 1
    _, text = _pdf_text(HR_FILE, password=HR_USER_PASSWORD)
    assert "Salary Review 2026" in text and "\u20ac38,700 to \u20ac43,150" in text


def test_scanned_receipt_is_an_image_with_no_text_layer():
    path = DRIVE / "finance" / "2026-01-14-receipt-stationery-scan.pdf"
    with pdfplumber.open(path) as pdf:
        (page,) = pdf.pages
        assert page.chars == []
        assert (page.extract_text() or "") == ""
        (image,) = page.images
        assert image["width"] == pytest.approx(float(page.width))
    assert pypdfium2.PdfDocument(path)[0].get_textpage().count_chars() == 0


def test_truncated_pdf_does_not_open():
    data = (DRIVE / "events" / "spring-reading-programme-2026.pdf").read_bytes()
    # A PDF starts with "%PDF-" and ends with "%%EOF" (ISO 32000-1, 7.5.2 and 7.5.5;
    # quoted from memory): this is the start of a real PDF with its end cut off.
    assert data.startswith(b"%PDF-1.") and b"%%EOF" not in data and b"startxref" not in data
    with pytest.raises(pypdfium2.PdfiumError):
        pypdfium2.PdfDocument(data)
    with pytest.raises(PdfminerException):
        with pdfplumber.open(DRIVE / "events" / "spring-reading-programme-2026.pdf") as pdf:
            [page.extract_text() for page in pdf.pages]


def test_french_notice_is_latin1_and_not_utf8():
    data = (DRIVE / "notices" / "brackenmoor-closure.fr.txt").read_bytes()
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8")
    text = data.decode("iso-8859-1")
    # ISO/IEC 8859-1 puts é at 0xE9 and ç at 0xE7 (quoted from memory; Python's codec agrees).
    assert b"\xe9" in data and b"\xe7" in data
    for letter in "éèàçô":
        assert letter in text
    assert "Fermeture temporaire de la bibliothèque de Brackenmoor" in text
    assert len(text.split()) > 250


def test_empty_and_binary_text_files():
    assert (DRIVE / "it" / "scanner-log.txt").stat().st_size == 0
    data = (DRIVE / "it" / "label-printer-logo.txt").read_bytes()
    # The eight-byte PNG signature (PNG specification, section 5.2; quoted from memory).
    assert data.startswith(b"\x89PNG\r\n\x1a\n") and b"\x00" in data


def test_plain_english_notes_are_utf8():
    for rel in ("README.txt", "volunteers/volunteer-rota-spring-2026.txt"):
        text = (DRIVE / rel).read_bytes().decode("utf-8")
        assert "Quillfern" in text and len(text.split()) > 150
    assert "Zoë Marchetti" in (DRIVE / "volunteers" / "volunteer-rota-spring-2026.txt").read_text("utf-8")


# --- HTML, Markdown and Word ---------------------------------------------------------------


def test_intranet_pages_share_their_boilerplate_and_one_declares_its_charset():
    pages = {p.name: p.read_text("utf-8") for p in sorted((DRIVE / "intranet").glob("*.html"))}
    assert len(pages) == 4

    def block(html: str, tag: str) -> str:
        return re.search(r"<%s\b.*?</%s>" % (tag, tag), html, re.S).group(0)

    for tag in ("header", "nav", "footer", "style", "script"):
        shapes = {re.sub(r"Page owner:.*?</p>", "", block(html, tag), flags=re.S) for html in pages.values()}
        assert len(shapes) == 1, tag
    declaring = [name for name, html in pages.items() if '<meta charset="utf-8">' in html]
    assert declaring == ["opening-hours.html"]
    assert "<table>" in pages["opening-hours.html"]
    for html in pages.values():
        assert "<h1>" in html and "<h2>" in html and "<h3>" in html and "<li>" in html


def test_german_notice_is_marked_german():
    html = (DRIVE / "notices" / "brackenmoor-closure.de.html").read_text("utf-8")
    assert '<html lang="de">' in html
    assert "Schließung" in html and html.count("<p>") >= 6


def test_board_minutes_use_atx_setext_lists_and_a_fence():
    texts = [p.read_text("utf-8") for p in sorted((DRIVE / "board").glob("*.md"))]
    assert len(texts) == 2
    joined = "\n".join(texts)
    assert re.search(r"^# \S", joined, re.M) and re.search(r"^## \S", joined, re.M)
    assert re.search(r"^\S.*\n={3,}$", joined, re.M)  # Setext level 1
    assert re.search(r"^\S.*\n-{3,}$", joined, re.M)  # Setext level 2
    assert re.search(r"^- ", joined, re.M) and re.search(r"^1\. ", joined, re.M)
    assert joined.count("\n```") >= 4  # two fences, each opened and closed


def test_booking_form_has_title_headings_and_a_field_table():
    path = DRIVE / "forms" / "meeting-room-booking-form.docx"
    document = docx.Document(path)
    assert document.core_properties.title == "Meeting Room Booking Form"
    styles = [(p.style.name, p.text) for p in document.paragraphs if p.style.name.startswith("Heading")]
    assert styles[0] == ("Heading 1", "Meeting Room Booking Form")
    assert [name for name, _ in styles[1:]] == ["Heading 2"] * 4
    fields = [row.cells[0].text for row in document.tables[0].rows]
    assert fields[0] == "Field" and "Date of booking" in fields and len(fields) >= 10
    # Re-zipped for reproducible bytes: one fixed timestamp on every member.
    assert {info.date_time for info in zipfile.ZipFile(path).infolist()} == {(2026, 1, 12, 14, 30, 0)}
