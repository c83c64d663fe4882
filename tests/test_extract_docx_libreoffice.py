"""A .docx written by another program, checked against that program's own reading.

Outside reference: LibreOffice Writer (Debian package libreoffice-writer-nogui, run
headless). It imports an HTML page written here, saves it as .docx ("MS Word 2007
XML"), then exports that .docx as UTF-8 text. We read the .docx with python-docx and
compare: the words in order, heading levels against the h1-h6 of the HTML (the HTML
standard's ranks, read by lxml), table rows, and the title LibreOffice puts in the
core properties from <title>.

Bound: the word sequences must be equal, not merely close. Both sides read the same
runs of the same paragraphs; the only marks that differ by design are list bullets
(ours "-", LibreOffice's "•") and table cell separators (ours " | ", LibreOffice's line
breaks), which are left out of the comparison. Measured: equal.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import lxml.html
import pytest

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import HEADING, OK, PARAGRAPH, TABLE, Source

GUIDE = """<!DOCTYPE html>
<html><head><meta charset="utf-8"><title>Volunteer guide for the spring season</title></head>
<body>
<h1>Volunteer guide</h1>
<p>Volunteers keep the reading rooms of the Quillfern Library Cooperative open on
Saturdays and help with the <b>spring events</b> at every branch.</p>
<h2>Shifts</h2>
<p>A shift lasts three hours and starts at the front desk, where the duty coordinator
hands out the keys and the alarm code for the day.</p>
<ul><li>Sign in at the desk.</li><li>Check the returns trolley.</li>
<li>Tidy the children's corner before the doors open.</li></ul>
<h3>Swapping a shift</h3>
<p>Post the swap on the staff room board at least two days ahead, and tell the
coordinator of the branch you leave.</p>
<table>
<tr><th>Day</th><th>Branch</th><th>Coordinator</th></tr>
<tr><td>Saturday</td><td>Lindle Cross</td><td>Ada Penhallow</td></tr>
<tr><td>Sunday</td><td>Sorrel Wharf</td><td>Tomasz Quenby</td></tr>
</table>
<h2>Safety</h2>
<p>Fire exits are marked in green; the assembly point is the car park behind the branch.</p>
<h4>First aid</h4>
<p>The first aid box is kept under the front desk; the log book next to it records every use.</p>
</body></html>
"""


def soffice(args: list[str], profile: Path) -> None:
    subprocess.run(["soffice", f"-env:UserInstallation=file://{profile}", "--headless", *args],
                   check=True, capture_output=True, timeout=180)


@pytest.fixture(scope="module")
def converted(tmp_path_factory):
    if shutil.which("soffice") is None:
        pytest.fail("needs LibreOffice Writer (Debian package libreoffice-writer-nogui): "
                    "run `make system-deps`")
    work = tmp_path_factory.mktemp("libreoffice")
    profile = work / "profile"
    html = work / "guide.html"
    html.write_text(GUIDE, encoding="utf-8")
    soffice(["--infilter=HTML (StarWriter)", "--convert-to", "docx:MS Word 2007 XML",
             "--outdir", str(work), str(html)], profile)
    docx_path = work / "guide.docx"
    soffice(["--convert-to", "txt:Text (encoded):UTF8", "--outdir", str(work / "txt"),
             str(docx_path)], profile)
    text = (work / "txt" / "guide.txt").read_text(encoding="utf-8-sig")
    return docx_path.read_bytes(), text


def read(data: bytes):
    source = Source(doc_id="d", source_path="volunteers/guide.docx", data=data, size=len(data), mtime=0.0)
    (page,) = extract(source, ExtractParams(), StepContext())
    return page


MARKS = {"-", "\u2022", "|"}


def test_words_in_order_match_libreoffices_own_text_export(converted):
    data, reference = converted
    page = read(data)
    assert page.status == OK and page.format == "docx"
    ours = [w for w in page.text.split() if w not in MARKS]
    theirs = [w for w in reference.split() if w not in MARKS]
    assert len(theirs) > 120
    assert ours == theirs


def test_headings_keep_the_levels_of_the_html_it_came_from(converted):
    data, _ = converted
    page = read(data)
    tree = lxml.html.fromstring(GUIDE.encode())
    expected = [(int(h.tag[1]), " ".join(h.text_content().split()))
                for h in tree.iter("h1", "h2", "h3", "h4", "h5", "h6")]
    assert [(b.level, b.text) for b in page.blocks if b.kind == HEADING] == expected


def test_tables_lists_and_title(converted):
    data, _ = converted
    page = read(data)
    assert page.title == "Volunteer guide for the spring season"
    tables = [b.text for b in page.blocks if b.kind == TABLE]
    assert tables == ["Day | Branch | Coordinator\nSaturday | Lindle Cross | Ada Penhallow\n"
                      "Sunday | Sorrel Wharf | Tomasz Quenby"]
    lists = [b.text for b in page.blocks if b.kind == PARAGRAPH and b.text.startswith("- ")]
    assert lists == ["- Sign in at the desk.\n- Check the returns trolley.\n"
                     "- Tidy the children's corner before the doors open."]
