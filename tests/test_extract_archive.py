"""Archives and compressed files: members handed back as documents of their own, and
the guards (count, size, compression ratio, nesting, names escaping the archive,
encrypted members), each with its own reason.

Outside references: real archives that Debian's libpython3.11-testsuite ships
(/usr/lib/python3.11/test/testtar.tar and testtar.tar.xz, zipdir.zip), listed by GNU
tar and Info-ZIP's unzip; bzip2-doc's manual.pdf.gz decompressed by gzip(1).
"""

from __future__ import annotations

import hashlib
import io
import subprocess
import tarfile
import zipfile
from pathlib import Path

import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.unpack import decompress
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, OK, SKIPPED, Source

PYTEST_DATA = Path("/usr/lib/python3.11/test")  # libpython3.11-testsuite
BZIP2_MANUAL = Path("/usr/share/doc/bzip2/manual.pdf.gz")  # bzip2-doc


def run(data: bytes, name: str, depth: int = 0, **params):
    source = Source(doc_id="d", source_path=f"archive/{name}", data=data, size=len(data), mtime=0.0, depth=depth)
    return extract(source, ExtractParams(**params), StepContext())


def zip_of(files: dict[str, bytes], method=zipfile.ZIP_DEFLATED) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=method) as z:
        for name, data in files.items():
            z.writestr(zipfile.ZipInfo(name, (2024, 3, 12, 10, 0, 0)), data, compress_type=method)
    return buf.getvalue()


def members(pages) -> dict[str, bytes]:
    return {m.name: m.data for p in pages for m in p.members}


def test_a_zip_gives_its_members_by_name_and_one_skipped_unit_saying_so():
    data = zip_of({"march/minutes.txt": b"Minutes of March.", "april/minutes.txt": b"Minutes of April.",
                   "march/": b""})
    pages = run(data, "2024-minutes.zip")
    assert len(pages) == 1 and pages[0].status == SKIPPED and pages[0].format == "zip"
    assert pages[0].reason == "zip archive: 2 member(s), each read as a document of its own"
    assert members(pages) == {"april/minutes.txt": b"Minutes of April.", "march/minutes.txt": b"Minutes of March."}
    # the same names, in the same order, every run
    assert [m.name for m in run(data, "2024-minutes.zip")[0].members] == ["april/minutes.txt", "march/minutes.txt"]


def test_a_zip_bomb_is_refused_by_its_compression_ratio():
    bomb = zip_of({"zeros.txt": bytes(20_000_000)})
    assert len(bomb) < 100_000
    page = run(bomb, "bomb.zip")[0]
    assert page.status == FAILED
    assert page.reason.startswith("compression ratio ") and "over the limit of 100:1" in page.reason
    assert page.members == []
    # a small archive of blank lines is not judged by its ratio (under 1 MB unpacked)
    assert run(zip_of({"blank.txt": b"\n" * 500_000}), "blank.zip")[0].status == SKIPPED


def test_names_that_escape_the_archive_refuse_it_whole():
    for evil in ("../outside.txt", "/etc/passwd", "notes/../../up.txt", "C:/windows/x.txt", "..\\back.txt"):
        page = run(zip_of({"fine.txt": b"ok", evil: b"x"}), "evil.zip")[0]
        assert page.status == FAILED, evil
        assert page.reason == f"member name escapes the zip archive: {evil!r}"
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w") as t:
        info = tarfile.TarInfo("../../etc/cron.d/job")
        info.size = 2
        t.addfile(info, io.BytesIO(b"hi"))
    page = run(buf.getvalue(), "evil.tar")[0]
    assert page.status == FAILED and page.reason == "member name escapes the tar archive: '../../etc/cron.d/job'"


def test_member_count_unpacked_size_and_nesting_have_their_own_reasons():
    many = zip_of({f"n{i}.txt": b"x" for i in range(12)})
    page = run(many, "many.zip", max_members=10)[0]
    assert page.status == FAILED and page.reason == "too many members: the zip archive holds 12, over the limit of 10 (max_members)"
    big = zip_of({"a.txt": bytes(range(256)) * 8000}, method=zipfile.ZIP_STORED)
    page = run(big, "big.zip", max_unpacked_mb=1)[0]
    assert page.status == FAILED and page.reason == "too large unpacked: the zip archive holds more than 1 MB (max_unpacked_mb)"
    inner = zip_of({"a.txt": b"deep"})
    page = run(inner, "deep.zip", depth=3)[0]
    assert page.status == FAILED
    assert page.reason == "nested too deep: this zip archive sits inside 3 containers, over the limit of 3 (max_nesting)"
    assert run(inner, "deep.zip", depth=2)[0].status == SKIPPED


def test_an_encrypted_member_is_left_out_and_listed():
    data = bytearray(zip_of({"open.txt": b"open", "secret.txt": b"secret"}, method=zipfile.ZIP_STORED))
    # Set the encryption flag bit (APPNOTE 4.4.4, bit 0) of secret.txt in its central
    # directory entry, as an encrypting zip tool would.
    cd = data.rfind(b"PK\x01\x02")
    data[cd + 8] |= 0x01
    page = run(bytes(data), "locked.zip")[0]
    assert page.status == SKIPPED and "1 left out" in page.reason
    assert page.payload["removed"] == [{"kind": "member", "text": "secret.txt", "reason": "password protected"}]
    assert list(members([page])) == ["open.txt"]


def test_broken_archives_fail_with_their_format_named():
    good = zip_of({"a.txt": b"hello " * 100})
    page = run(good[: len(good) // 2], "cut.zip")[0]
    assert page.status == FAILED and page.reason.startswith("unreadable zip archive: ")
    gz = subprocess.run(["gzip", "-c"], input=b"hello world\n" * 1000, capture_output=True, check=True).stdout
    page = run(gz[: len(gz) // 2], "notes.txt.gz")[0]
    assert page.status == FAILED and page.reason.startswith("unreadable gzip file: EOFError")


@pytest.mark.skipif(not (PYTEST_DATA / "testtar.tar").exists(), reason="needs libpython3.11-testsuite")
def test_a_tar_member_named_in_latin1_is_read_with_its_stray_bytes_spelled():
    # A tar holds its names as bytes; one written on a Latin-1 system gives Python lone
    # surrogates, which no Parquet string takes (a run stopped in its plan on such a
    # member). The member is read, under a name that spells those bytes \xNN; GNU tar
    # lists the same bytes (its C quoting: \351 is the byte 0xE9).
    data = b"The reading room opens at nine on weekdays.\n"
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w", format=tarfile.GNU_FORMAT, encoding="latin-1") as t:
        for name in ("r\u00e9sum\u00e9.txt", "notes/caf\u00e9.txt"):
            info = tarfile.TarInfo(name)
            info.size = len(data)
            t.addfile(info, io.BytesIO(data))
    got = members(run(buf.getvalue(), "latin1.tar"))
    assert got == {"notes/caf\\xe9.txt": data, "r\\xe9sum\\xe9.txt": data}
    listing = subprocess.run(["tar", "--quoting-style=c", "-tf", "-"], input=buf.getvalue(),
                             capture_output=True, check=True).stdout.decode().split()
    assert listing == ['"r\\351sum\\351.txt"', '"notes/caf\\351.txt"']


def test_a_real_tar_gives_every_regular_file_gnu_tar_lists():
    # Reference: GNU tar's listing of the same files (its own tar and xz readers, not Python's).
    for name in ("testtar.tar", "testtar.tar.xz"):
        listing = subprocess.run(["tar", "-tvf", str(PYTEST_DATA / name)], capture_output=True,
                                 text=True, errors="replace").stdout.splitlines()
        sizes = sorted(int(line.split()[2]) for line in listing if line[0] in "-C")
        pages = run((PYTEST_DATA / name).read_bytes(), name)
        assert pages[0].status == SKIPPED, pages[0].reason
        assert sorted(len(d) for d in members(pages).values()) == sizes
    got = members(run((PYTEST_DATA / "testtar.tar").read_bytes(), "testtar.tar"))
    assert len(got) == 26
    regtype = subprocess.run(["tar", "-xOf", str(PYTEST_DATA / "testtar.tar"), "ustar/regtype"],
                             capture_output=True, check=True).stdout
    assert got["ustar/regtype"] == regtype
    removed = {r["text"]: r["reason"] for r in run((PYTEST_DATA / "testtar.tar").read_bytes(),
                                                    "testtar.tar")[0].payload["removed"]}
    assert removed["ustar/symtype"] == "link, not a document"
    assert removed["ustar/blktype"] == "special file, not a document"
    assert "read as testtar.tar, decompressed from 1 layer(s)" in run(
        (PYTEST_DATA / "testtar.tar.xz").read_bytes(), "testtar.tar.xz")[0].warnings


@pytest.mark.skipif(not (PYTEST_DATA / "zipdir.zip").exists(), reason="needs libpython3.11-testsuite")
def test_a_real_zip_gives_the_files_unzip_lists():
    # Reference: Info-ZIP's `unzip -Z1` names (files only: folders end with '/').
    names = subprocess.run(["unzip", "-Z1", str(PYTEST_DATA / "zipdir.zip")], capture_output=True,
                           text=True, check=True).stdout.split()
    pages = run((PYTEST_DATA / "zipdir.zip").read_bytes(), "zipdir.zip")
    assert sorted(members(pages)) == sorted(n for n in names if not n.endswith("/"))


@pytest.mark.skipif(not BZIP2_MANUAL.exists(), reason="needs bzip2-doc")
def test_a_compressed_pdf_is_read_as_the_pdf_inside():
    data = BZIP2_MANUAL.read_bytes()
    # Reference: gzip(1) decompresses the same bytes.
    plain = subprocess.run(["gzip", "-dc", str(BZIP2_MANUAL)], capture_output=True, check=True).stdout
    inner = decompress(data, "gzip", "bzip2/manual.pdf.gz", 10**9, 100)
    assert hashlib.sha256(inner.data).digest() == hashlib.sha256(plain).digest()
    assert inner.name == "manual.pdf"
    pages = run(data, "manual.pdf.gz")
    # every page read (a contents page is dropped as navigation, with its reason)
    assert pages[0].format == "pdf" and all(p.status == OK or p.reason.startswith("navigation page") for p in pages)
    info = subprocess.run(["pdfinfo", "-"], input=plain, capture_output=True, check=True).stdout.decode()
    assert len(pages) == int(next(l.split()[1] for l in info.splitlines() if l.startswith("Pages:")))
    assert "bzip2" in pages[0].text.lower()


def test_bz2_and_xz_files_and_their_bombs():
    text = "Opening hours of the Quillfern branches.\n".encode()
    for tool, suffix in (("bzip2", "bz2"), ("xz", "xz"), ("gzip", "gz")):
        packed = subprocess.run([tool, "-c"], input=text, capture_output=True, check=True).stdout
        page = run(packed, f"hours.txt.{suffix}")[0]
        assert page.status == OK and page.text == text.decode().strip(), tool
        bomb = subprocess.run([tool, "-c"], input=bytes(30_000_000), capture_output=True, check=True).stdout
        page = run(bomb, f"zeros.txt.{suffix}")[0]
        assert page.status == FAILED and page.reason.startswith("compression ratio "), tool


def test_a_compressed_non_document_is_skipped_by_the_name_inside():
    packed = subprocess.run(["gzip", "-c"], input=b"body { margin: 0 }\n" * 50, capture_output=True, check=True).stdout
    page = run(packed, "site.css.gz")[0]
    assert page.status == SKIPPED
    assert page.reason.startswith("not a document: stylesheet (.css)") and page.reason.endswith("(inside the compressed file)")
