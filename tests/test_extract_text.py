"""Plain text, encodings and format sniffing."""

from __future__ import annotations

import codecs
import io
import random
import zipfile
from pathlib import Path

import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.sniff import decode, sniff
from thresher.steps.spec import StepContext
from thresher.steps.units import DOCUMENT_LOCATOR, FAILED, HEADING, OK, PARAGRAPH, Source

FRENCH = (
    "Le café de la coopérative ouvre à huit heures.\n"
    "Les bénévoles réparent les reliures abîmées et accueillent les lecteurs.\n"
    "\n"
    "Où rangez-vous les romans policiers ? À côté de la fenêtre, près du piano.\n"
)
RUSSIAN = (
    "Библиотечный кооператив открывается в девять часов утра.\n"
    "Читатели могут брать до шести книг одновременно.\n"
    "\n"
    "Просроченные книги нужно вернуть в течение недели, иначе выдача приостанавливается.\n"
)


def run(data: bytes, name: str = "notes.txt", **params):
    source = Source(doc_id="d", source_path=f"notices/{name}", data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


def one(data: bytes, name: str = "notes.txt", **params):
    pages = run(data, name, **params)
    assert len(pages) == 1
    return pages[0]


def test_paragraphs_split_at_blank_lines_and_lines_kept():
    page = one("Opening hours\r\nMon-Fri 9-18\r\n\r\n\r\nSat 10-14\r\n  \r\nClosed on Sundays.\r\n".encode())
    assert page.status == OK and page.format == "text"
    assert page.locator == "file" and page.page is None and page.parents == []
    assert [(b.kind, b.text) for b in page.blocks] == [
        (PARAGRAPH, "Opening hours\nMon-Fri 9-18"),
        (PARAGRAPH, "Sat 10-14"),
        (PARAGRAPH, "Closed on Sundays."),
    ]
    assert page.text == "Opening hours\nMon-Fri 9-18\n\nSat 10-14\n\nClosed on Sundays."
    assert page.payload["method"] == "plain" and page.payload["encoding"] == "utf-8"
    assert page.payload["page_count"] == 1
    assert page.payload["char_count"] == len(page.text)
    assert page.payload["word_count"] == 9
    assert page.title == "notes"  # no heading: the file stem


def test_old_mac_line_endings_and_form_feeds():
    page = one(b"First part\rstill first\r\x0cSecond part")
    assert [b.text for b in page.blocks] == ["First part\nstill first", "Second part"]


def test_indentation_inside_a_paragraph_is_kept():
    page = one(b"Shelf   Count\n  A1      12\n  B2       7\n")
    assert page.blocks[0].text == "Shelf   Count\n  A1      12\n  B2       7"


def test_underlined_title_lines_are_headings():
    page = one(b"Branch Notices\n==============\n\nRoof repairs\n------------\n\nThe east wing is closed.\n")
    assert [(b.kind, b.level, b.text) for b in page.blocks] == [
        (HEADING, 1, "Branch Notices"),
        (HEADING, 2, "Roof repairs"),
        (PARAGRAPH, 0, "The east wing is closed."),
    ]
    assert page.title == "Branch Notices"


def test_latin1_text_decodes_accented_letters():
    page = one(FRENCH.encode("latin-1"), "avis.txt")
    assert page.status == OK
    assert "coopérative" in page.text and "À côté de la fenêtre" in page.text
    assert page.text == FRENCH.strip()
    # Latin-1 and its superset cp1252 agree on every letter here.
    assert page.payload["encoding"] in ("cp1252", "iso8859-1")
    assert page.payload["unprintable_share"] == 0.0


def test_koi8r_text_decodes_cyrillic():
    page = one(RUSSIAN.encode("koi8-r"), "объявление.txt")
    assert page.payload["encoding"] == "koi8-r"
    assert page.text == RUSSIAN.strip()


def test_mostly_utf8_with_three_bad_bytes_is_utf8_with_replacements():
    good = "Ünïcödé résumé for the Quillfern café — naïve façade.\n" * 3
    data = good.encode("utf-8")
    # Three stray bytes between ASCII letters: three invalid sequences.
    damaged = data.replace(b"for", b"f\xffor", 1).replace(b"Quillfern", b"Quill\xfefern", 1)
    damaged = damaged.replace(b"the", b"th\xffe", 1)
    page = one(damaged)
    assert page.payload["encoding"] == "utf-8"
    assert "3 invalid byte sequences replaced" in page.warnings
    assert page.text.count("\ufffd") == 3
    assert page.payload["unprintable_share"] == 3 / len(page.text)


def test_utf8_bom_and_utf16_with_and_without_bom():
    assert one(codecs.BOM_UTF8 + "Grüße".encode()).text == "Grüße"
    page = one("Grüße aus der Bücherei\n".encode("utf-16"))  # with BOM
    assert page.text == "Grüße aus der Bücherei" and page.payload["encoding"].startswith("utf-16")
    page = one("Grüße aus der Bücherei\n".encode("utf-16-le"))  # no BOM
    assert page.text == "Grüße aus der Bücherei" and page.payload["encoding"] == "utf-16-le"


@pytest.mark.parametrize("encoding", ["utf-16-le", "utf-16-be", "utf-32-le", "utf-32-be"])
def test_wide_text_without_bom_with_characters_whose_low_byte_is_nul(encoding):
    # The GPL's text (Debian base-files, /usr/share/common-licenses/GPL-3) with
    # characters whose low byte is 00 in UTF-16 (U+0100, U+2000, the ideographic
    # space U+3000, U+4E00) and one past U+FFFF (U+10300, a surrogate pair in UTF-16)
    # put in: a NUL on the "wrong" side of a byte pair made such a file binary.
    licence = Path("/usr/share/common-licenses/GPL-3").read_text()[:6000]
    text = licence.replace("freedom", "freedom \u0100\u2000\u3000\u4e00 \U00010300", 3)
    page = one(text.encode(encoding), "licence.txt")
    assert page.status == OK, page.reason
    assert page.payload["encoding"] == encoding
    assert "\u0100\u2000\u3000\u4e00 \U00010300" in page.text
    assert page.text.lstrip().startswith("GNU GENERAL PUBLIC LICENSE")


def test_decode_prefers_bom_over_declared_charset():
    decoded = decode(codecs.BOM_UTF8 + "café".encode(), declared="iso-8859-1")
    assert decoded.text == "café" and decoded.encoding == "utf-8"


def test_binary_named_txt_is_not_text():
    noise = random.Random(7).randbytes(4096)
    page = one(noise, "budget.txt")
    assert page.status == FAILED and page.locator == DOCUMENT_LOCATOR
    assert page.reason.startswith("not text: ") and page.reason.endswith("(binary content)")
    assert "NUL" in page.reason


def test_control_heavy_bytes_without_nul_are_not_text():
    data = bytes(range(1, 9)) * 100 + b"some words" * 5
    page = one(data, "log.txt")
    assert page.status == FAILED
    assert page.reason.startswith("not text: ") and page.reason.endswith("control bytes (binary content)")


# Markus Kuhn's "UTF-8 decoder capability and stress test" as Debian ships it in the
# package libsdl2-tests (SDL's testiconv reads it): 21,535 bytes, 379 malformed sequences
# on purpose, one DEL (its test line 2.2.1). SDL's copy dropped the NUL of line 2.1.1 and
# notes "there's a null added at the end of the test", so the test adds that one NUL.
KUHN_UTF8_TEST = Path("/usr/libexec/installed-tests/SDL2/utf8.txt")


def _debian_file(path: Path, package: str) -> bytes:
    if not path.is_file():
        pytest.fail(f"{path} is missing: install the Debian package {package} (make system-deps)")
    return path.read_bytes()


@pytest.mark.parametrize("extra", [b"", b"\x00"], ids=["as shipped", "with its NUL"])
def test_utf8_stress_test_file_with_stray_controls_is_text(extra):
    data = _debian_file(KUHN_UTF8_TEST, "libsdl2-tests") + extra
    page = one(data, "UTF-8-test.txt")
    assert page.status == OK, page.reason
    removed = 1 + len(extra)  # the DEL, and the NUL when present
    assert page.payload["control_bytes"] == removed
    names = "1 x NUL, 1 x DEL" if extra else "1 x DEL"
    assert f"{removed} stray control byte(s) removed ({names}): too few for binary content" in page.warnings
    assert "\x00" not in page.text and "\x7f" not in page.text
    # The prose around the test lines comes through whole, first line to last.
    assert page.blocks[0].text == "UTF-8 decoder capability and stress test"
    assert "THE END" in page.blocks[-1].text
    assert "Markus Kuhn" in page.text


def _first_bytes(paths, n):
    return [p.read_bytes()[:65536] for p in sorted(paths)[:n]]


def test_stray_control_limit_keeps_debian_binaries_out_and_its_texts_in():
    # The limit (sniff.STRAY_CONTROL_LIMIT) against files Debian ships: gettext message
    # catalogues (.mo, from many packages) and terminfo entries (ncurses-base) carry
    # words but are binary, and no signature names them; the licence texts
    # (base-files' common-licenses) are text. The binary with the fewest control bytes
    # measured was Python's compiled pydoc topics (0.32 %; Debian byte-compiles
    # libpython3.11-stdlib when installing it), the closest case to the limit.
    catalogues = _first_bytes(Path("/usr/share/locale").glob("*/LC_MESSAGES/*.mo"), 150)
    terminfo = _first_bytes(Path("/lib/terminfo").glob("*/*"), 40)
    topics = _first_bytes(Path("/usr/lib/python3.11/pydoc_data/__pycache__").glob("topics.*.pyc"), 1)
    assert len(catalogues) >= 50 and len(terminfo) >= 10 and topics
    for data in catalogues + terminfo + topics:
        found = sniff(data, "notes.txt")
        assert found.reason.startswith("not text: "), data[:40]
    licences = _first_bytes(Path("/usr/share/common-licenses").glob("*"), 40)
    assert len(licences) >= 10
    for data in licences:
        found = sniff(data, "licence.txt")
        assert found.format == "text" and found.control_bytes == 0


def test_one_stray_nul_in_text_is_removed_with_a_warning():
    data = FRENCH.encode() + b"\x00" + FRENCH.encode()
    page = one(data)
    assert page.status == OK and page.payload["control_bytes"] == 1
    assert "\x00" not in page.text and page.text.count("Le café") == 2
    assert page.warnings == ["1 stray control byte(s) removed (1 x NUL): too few for binary content"]


def test_short_random_blobs_are_no_more_often_text_than_before_the_allowance():
    # The allowance of a few stray bytes starts at 256 bytes (STRAY_CONTROL_MIN_BYTES):
    # below that it would pass most 16-byte blobs as text.
    as_text = {size: sum(not sniff(random.Random(size * 1000 + i).randbytes(size), "x.txt").reason
                         for i in range(100)) for size in (16, 64, 256, 4096)}
    assert as_text[16] <= 20 and as_text[64] <= 1 and as_text[256] == as_text[4096] == 0, as_text
    # A short note with one NUL is below the allowance's size: binary, as it always was.
    assert sniff(b"Returns desk open at nine\x00", "x.txt").reason.startswith("not text: 1 NUL bytes")


def test_known_binary_signatures_name_the_format():
    png = b"\x89PNG\r\n\x1a\n" + b"\x00\x00\x00\rIHDR" + bytes(40)
    assert one(b"\x7fELF" + bytes(60), "tool.txt").reason == "not a document: executable (.txt); add 'executable' to extract's read_kinds to read such files"
    assert one(b"PAR1" + bytes(40), "table.txt").reason == "not text: Parquet file (binary content)"
    assert one(b"7z\xbc\xaf\x27\x1c" + bytes(30), "notes.txt").reason == "not text: 7-Zip archive (binary content)"


def test_empty_file():
    page = one(b"", "empty.txt")
    assert page.status == FAILED and page.reason == "empty file (0 bytes)"
    assert page.locator == DOCUMENT_LOCATOR and page.page is None and page.blocks == []


def test_whitespace_only_file_is_ok_and_empty_with_a_warning():
    page = one(b"  \n\n\t\n")
    assert page.status == OK and page.blocks == []
    assert page.warnings == ["no text (the file holds only whitespace)"]


def test_file_too_large_names_both_sizes():
    page = one(b"a" * 2_500_000, max_file_mb=2)
    assert page.status == FAILED
    assert page.reason == "file too large: 2.5 MB over the limit of 2 MB"


def zip_with(names: dict[str, bytes]) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as archive:
        for name, content in names.items():
            archive.writestr(name, content)
    return buf.getvalue()


def test_zip_containers_other_than_office_books_are_archives_or_unsupported():
    # A plain zip is an archive (tests/test_extract_archive.py), whatever its name says.
    page = one(zip_with({"a.txt": b"x"}), "bundle.docx")
    assert page.format == "zip" and "content is zip although the file is named .docx" in page.warnings
    data = zip_with({"mimetype": b"application/vnd.oasis.opendocument.graphics"})
    assert one(data, "logo.odg").reason == (
        "unsupported format: OpenDocument file (application/vnd.oasis.opendocument.graphics)"
    )


def test_damaged_zip_named_docx():
    data = zip_with({"word/document.xml": b"<w:document/>" * 50})
    page = one(data[: len(data) // 2], "minutes.docx")
    assert page.status == FAILED and page.reason.startswith("unreadable DOCX: ")


def test_legacy_office_kinds_and_encrypted_office_files():
    from thresher.steps.extract.sniff import sniff
    ole = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504)
    assert sniff(ole + "WordDocument".encode("utf-16-le"), "minutes.doc").format == "doc"
    assert sniff(ole + "Workbook".encode("utf-16-le"), "budget.xls").format == "xls"
    deck = sniff(ole + "PowerPoint Document".encode("utf-16-le"), "talk.doc")
    assert deck.format == "ppt" and deck.warnings == ["content is ppt although the file is named .doc"]
    assert one(ole + b"nothing we know", "thing.dat").reason == (
        "unsupported format: OLE2 compound file that is not a Word, Excel or PowerPoint document"
    )
    assert one(ole + b"nothing we know", "minutes.doc").reason == (
        "unreadable DOC: the compound file names no Word, Excel or PowerPoint stream "
        "(damaged or truncated)")
    encrypted = ole + "EncryptionInfo".encode("utf-16-le") + bytes(100)
    assert one(encrypted, "salaries.docx").reason == "password protected"


def test_content_decides_the_format_and_a_mismatch_is_noted():
    html = b"<!DOCTYPE html><html><head><title>Rota</title></head><body><p>Shifts</p></body></html>"
    page = one(html, "rota.txt")
    assert page.format == "html" and page.title == "Rota"
    assert "content is html although the file is named .txt" in page.warnings
    found = sniff(b"# Notes\n\nplain words", "notes.md")
    assert found.format == "markdown"
    assert sniff(b"# Notes\n\nplain words", "notes.txt").format == "text"
    assert sniff(b"<p>Only a fragment</p>", "fragment.htm").format == "html"
    assert sniff(b"Use <b> for bold.", "howto.txt").format == "text"
