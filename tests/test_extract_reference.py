"""Checks against the outside world: documents Debian ships, read by Debian's tools.

- PDF text against poppler-utils' pdftotext and page counts against pdfinfo, on the
  PDFs that Debian documentation packages install under /usr/share/doc
  (shared-mime-info: shared-mime-info-spec.pdf; libtasn1-doc: libtasn1.pdf; bzip2-doc:
  bzip2/manual.pdf.gz; fontconfig: fontconfig/fontconfig-user.pdf.gz), per document
  and per page.
- A real two-column page: Texinfo prints its indices in two columns; libtasn1.pdf's
  last page ("Function and Data Index") must be read column after column, in the
  order pdftotext reads it, and no other page of these PDFs has columns.
- HTML headings against the heading elements of real HTML manuals Debian ships
  (libffi8's Texinfo manual; libxslt1-dev's site and API reference), with the ranks
  the HTML standard gives h1-h6, read by lxml.html directly rather than by our walker.

`make test` (and so .ci/run) installs these Debian packages first (`make system-deps`:
poppler-utils shared-mime-info libtasn1-doc libffi-dev bzip2-doc fontconfig
libxslt1-dev); a test fails, not skips, when one is missing, so a reference check
cannot silently stop running.
"""

from __future__ import annotations

import glob
import gzip
import re
import shutil
import tempfile
import subprocess
from collections import Counter
from pathlib import Path

import lxml.html
import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import HEADING, OK, Source

DEBIAN_PDFS = [
    "/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",
    "/usr/share/doc/libtasn1-doc/libtasn1.pdf",
]
# Compressed by Debian's packaging (dh_compress): read through gzip.
DEBIAN_GZ_PDFS = [
    "/usr/share/doc/bzip2/manual.pdf.gz",          # bzip2-doc
    "/usr/share/doc/fontconfig/fontconfig-user.pdf.gz",  # fontconfig
]
PACKAGES = {"shared-mime-info-spec.pdf": "shared-mime-info", "libtasn1.pdf": "libtasn1-doc",
            "manual.pdf.gz": "bzip2-doc", "fontconfig-user.pdf.gz": "fontconfig"}
LIBFFI_HTML = sorted(glob.glob("/usr/share/doc/libffi8/html/*.html"))
LIBXSLT_HTML = sorted(glob.glob("/usr/share/doc/libxslt1-dev/**/*.html", recursive=True))


def run(path: str):
    data = Path(path).read_bytes()
    source = Source(doc_id="d", source_path=Path(path).name, data=data, size=len(data), mtime=0.0)
    # Navigation pages are kept: the text layer is compared page by page.
    return extract(source, ExtractParams(drop_navigation=False), StepContext())


_PLAIN: dict[str, str] = {}


def plain_pdf(path: str) -> str:
    """A path to the PDF itself (a gzipped one unpacked into a temporary file)."""
    if not Path(path).exists() or not shutil.which("pdftotext"):
        pytest.fail(f"needs {Path(path).name} (Debian package {PACKAGES[Path(path).name]}) and "
                    "poppler-utils: run `make system-deps`")
    if not path.endswith(".gz"):
        return path
    if path not in _PLAIN:
        out = Path(tempfile.mkdtemp()) / Path(path).name[:-3]
        out.write_bytes(gzip.decompress(Path(path).read_bytes()))
        _PLAIN[path] = str(out)
    return _PLAIN[path]


_PAGES: dict[str, list] = {}


def extracted(path: str):
    if path not in _PAGES:
        _PAGES[path] = run(plain_pdf(path))
    return _PAGES[path]


def poppler(tool: str, *args: str) -> str:
    return subprocess.run([tool, *args], capture_output=True, text=True, check=True).stdout


# Bullets are written "- " by us and kept as glyphs by pdftotext: leave both out.
BULLETS = {"-", "\u2022"}


def bag(text: str) -> Counter:
    return Counter(w for w in text.split() if w not in BULLETS)


@pytest.mark.parametrize("path", DEBIAN_PDFS, ids=lambda p: Path(p).name)
def test_pdf_text_matches_pdftotext(path):
    if not Path(path).exists() or not shutil.which("pdftotext"):
        pytest.fail("needs the Debian documentation PDF and poppler-utils: run `make system-deps`")
    pages = extracted(path)
    info = poppler("pdfinfo", path)
    expected_pages = int(next(line.split()[1] for line in info.splitlines() if line.startswith("Pages:")))
    assert len(pages) == expected_pages
    assert all(p.status == OK for p in pages)
    assert {p.payload["page_count"] for p in pages} == {expected_pages}

    # Bullets are written "- " by us and kept as glyphs by pdftotext: leave both out.
    bullets = {"-", "\u2022"}
    ours = Counter(w for p in pages for w in p.text.split() if w not in bullets)
    reference = Counter(
        w for w in poppler("pdftotext", "-enc", "UTF-8", path, "-").split() if w not in bullets
    )
    common = sum((ours & reference).values())
    precision = common / sum(ours.values())
    recall = common / sum(reference.values())
    # Measured with the PDFium reader: precision 1.0000 (shared-mime-info) and 0.9987
    # (libtasn1), recall 0.9875 and 0.9992 (pdfminer's reader before it: 0.9996/0.9998,
    # 0.987/0.9997); the words we lack are the running headers and page numbers we drop.
    assert precision >= 0.995, precision
    assert recall >= 0.98, recall


@pytest.mark.parametrize("path", DEBIAN_PDFS + DEBIAN_GZ_PDFS, ids=lambda p: Path(p).name)
def test_every_page_agrees_with_pdftotext(path):
    """Per page: the words we give, plus the lines we removed (and recorded), against
    pdftotext's words on that page (its pages end in form feeds)."""
    plain = plain_pdf(path)
    pages = extracted(path)
    reference = poppler("pdftotext", "-enc", "UTF-8", plain, "-").split("\f")
    scores = []
    for page in pages:
        assert page.status == OK, (page.page, page.reason)
        removed = " ".join(r["text"] for r in page.payload["removed"])
        ours, theirs = bag(page.text + " " + removed), bag(reference[page.page - 1])
        if not ours and not theirs:
            scores.append(1.0)  # a blank page, blank for both
            continue
        common = sum((ours & theirs).values())
        scores.append(2 * common / (sum(ours.values()) + sum(theirs.values())))
    scores.sort()
    # Word F1 per page. Measured: lowest page 1.000 (shared-mime-info), 0.994
    # (libtasn1), 0.986 (bzip2), 0.943 (fontconfig: a page of XML where pdftotext and we
    # cut "<!--" differently); median 1.000, 0.998, 1.000, 0.995. The bounds leave room
    # for such tokenising differences but not for lost or doubled lines: one line of 10
    # words lost from a 300-word page already costs 0.017.
    assert scores[0] >= 0.93, scores[:3]
    assert scores[len(scores) // 2] >= 0.99, scores
    # What was removed as page furniture really was: a few words a page at most. (A
    # chapter's own contents list, removed as "contents entry", is checked in
    # tests/test_extract_navigation.py.)
    for page in pages:
        furniture = [r for r in page.payload["removed"] if r["kind"] != "contents entry"]
        assert sum(len(r["text"].split()) for r in furniture) <= 12, furniture


@pytest.mark.parametrize("path", DEBIAN_PDFS + DEBIAN_GZ_PDFS, ids=lambda p: Path(p).name)
def test_page_counts_and_columns(path):
    plain = plain_pdf(path)
    pages = extracted(path)
    info = poppler("pdfinfo", plain)
    assert len(pages) == int(re.search(r"^Pages:\s+(\d+)", info, re.MULTILINE).group(1))
    # Texinfo sets its index in two columns; nothing else in these manuals has columns.
    two = [p.page for p in pages if p.payload["columns"] > 1]
    assert two == ([36] if path.endswith("libtasn1.pdf") else []), two


def test_the_two_column_index_is_read_in_pdftotexts_order():
    path = "/usr/share/doc/libtasn1-doc/libtasn1.pdf"
    plain_pdf(path)
    page = extracted(path)[35]
    assert page.payload["columns"] == 2
    # The index entries (asn1_... function names), in the order each reader gives them:
    # pdftotext reads the left column down, then the right one.
    names = re.compile(r"asn1_[a-z0-9_]+", re.IGNORECASE)
    theirs = names.findall(poppler("pdftotext", "-f", "36", "-l", "36", "-enc", "UTF-8", path, "-"))
    ours = names.findall(page.text)
    assert len(theirs) >= 40 and ours == theirs


@pytest.mark.parametrize("manual", ["libffi-dev", "libxslt1-dev"])
def test_html_headings_follow_the_standard_ranks(manual):
    files = LIBFFI_HTML if manual == "libffi-dev" else LIBXSLT_HTML
    if not files:
        pytest.fail(f"needs the HTML manual of Debian package {manual}: run `make system-deps`")
    checked = 0
    for path in files:
        tree = lxml.html.parse(path)
        expected = [
            (int(el.tag[1]), " ".join(el.text_content().split()))
            for el in tree.iter("h1", "h2", "h3", "h4", "h5", "h6")
        ]
        (page,) = run(path)
        got = [(b.level, b.text) for b in page.blocks if b.kind == HEADING]
        assert got == expected, path
        checked += len(expected)
    # libffi: 20 pages; libxslt1-dev: 99 pages with 1073 headings.
    assert checked >= (20 if manual == "libffi-dev" else 1000), checked
