"""Every content judgement is a column, counted by `thresher status`.

A drive of files Debian ships, each carrying one judgement: libtasn1's manual
(libtasn1-doc; a contents page and two index pages), the Hindi reference card
(debian-refcard; a text layer of mis-mapped glyphs on every page) and SDL's copy of the
UTF-8 decoder stress test (libsdl2-tests; one stray DEL byte). Counts taken from the
step tests that judge each file (test_extract_navigation, test_extract_text_layer,
test_extract_text) and checked here through the real flow, the store and the CLI.
"""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import pytest

from thresher.flows import cli, pipeline
from thresher.flows.config import load_definition
from thresher.flows.store import Store
from thresher.flows.summary import judgements, live_doc_ids, stages_of

FILES = {
    "manuals/libtasn1.pdf": ("/usr/share/doc/libtasn1-doc/libtasn1.pdf", "libtasn1-doc"),
    "cards/refcard-hi-a4.pdf": ("/usr/share/doc/debian-refcard/refcard-hi-a4.pdf.gz", "debian-refcard"),
    "notes/UTF-8-test.txt": ("/usr/libexec/installed-tests/SDL2/utf8.txt", "libsdl2-tests"),
}


@pytest.fixture(scope="module")
def judged_store(tmp_path_factory, prefect_harness) -> Path:
    base = tmp_path_factory.mktemp("judged")
    for name, (path, package) in FILES.items():
        src = Path(path)
        if not src.is_file():
            pytest.fail(f"{src} is missing: install the Debian package {package} (make system-deps)")
        data = src.read_bytes()
        dst = base / "drive" / name
        dst.parent.mkdir(parents=True, exist_ok=True)
        dst.write_bytes(gzip.decompress(data) if path.endswith(".gz") else data)
    pipeline.run(load_definition(), str(base / "drive"), str(base / "store"), workers=1, quiet=True)
    return base / "store"


def test_each_judgement_is_counted_from_its_column(judged_store):
    store = Store(judged_store)
    j = judgements(store, stages_of(store.runs()[-1].manifest), live_doc_ids(store))
    assert j.navigation_pages == {"contents": 1, "index": 2} and j.navigation_dropped == 3
    card_pages = [r for r in store.current("extract", "pages").to_pylist()
                  if r["source_path"] == "cards/refcard-hi-a4.pdf"]
    assert card_pages and j.layer_pages == j.layer_failed == len(card_pages) and j.layer_ocr == 0
    assert (j.control_bytes, j.control_files) == (1, 1)
    # The manual's synopses and code-like lines: blocks that did not vote.
    unvoted = store.current("language", "pages", columns=["unvoted_blocks"]).column("unvoted_blocks").to_pylist()
    assert j.unvoted_blocks == sum(unvoted) > 0 and j.unvoted_pages == sum(1 for n in unvoted if n)


def test_status_prints_and_answers_the_judgements(judged_store, capsys):
    assert cli.main(["status", "--store", str(judged_store)]) == 0
    out = capsys.readouterr().out
    assert "  navigation pages        3 (contents 1, index 2), 3 dropped" in out
    assert "  stray control bytes     1 removed from 1 file(s)" in out
    assert "unreadable text layers  " in out and "read by OCR" in out
    assert cli.main(["status", "--store", str(judged_store), "--json"]) == 0
    js = json.loads(capsys.readouterr().out)
    assert js["judgements"]["navigation_pages"] == {"contents": 1, "index": 2}
    assert js["judgements"]["control_bytes"] == 1


def test_the_review_page_lists_the_judged_pages(judged_store, tmp_path):
    out = tmp_path / "review.html"
    assert cli.main(["report", "--store", str(judged_store), "--out", str(out)]) == 0
    html = out.read_text(encoding="utf-8")
    problems = html[html.index('<section id="problems">'):]
    problems = problems[:problems.index("</section>")]
    rows = problems.split("<tr>")
    control = next(r for r in rows if "stray control bytes removed from the text" in r)
    assert ">judged<" in control and "UTF-8-test.txt" in control and "extract" in control
    unvoted = next(r for r in rows if "left out of the language vote" in r)
    assert ">judged<" in unvoted and "libtasn1.pdf" in unvoted
    # Dropped navigation pages and failed text layers stay listed by their reasons.
    assert any("navigation page (contents)" in r and ">dropped<" in r for r in rows)
    assert any("wrong characters" in r and ">failed<" in r for r in rows)
