"""The review pages (`thresher report`): a summary file and a folder of pages beside
it. Their figures against the store, the text comparison, the escaping proved in a
real headless Chromium, the look, and that a second report into the same folder
writes only the pages of documents the store holds something new for.

Two stores, each built by the real flow: the demo drive plus a re-saved copy of one
file (so dedup drops chunks that the page must link to what they duplicate), and a
small drive of files full of markup and script, run with a changed chain (an own
step, a format-limited step, no language or dedup step), reported, then run again
after a file is added and one document re-run, and reported into the same folder.
"""

from __future__ import annotations

import os
import random
import re
import shutil
import subprocess
from collections import Counter
from pathlib import Path

import lxml.html
import pytest
import yaml
from PIL import Image

from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text, load_definition
from thresher.flows.report import STATE_FILE, ReportError, pages_folder, write_report
from thresher.flows.report_html import diff_segments, render_comparison
from thresher.flows.store import Store

from conftest import SAMPLE

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run"]

# Each would add an element named after it (or change the title) if the browser ran it.
MARK = "document.documentElement.appendChild(document.createElement('{0}'))"
VECTORS = {
    "script": f"<script>document.title='pwned';{MARK.format('pwned-script')}</script>",
    "img": f"<img src=x onerror=\"document.title='pwned';{MARK.format('pwned-img')}\">",
    "svg": f"<svg onload=\"{MARK.format('pwned-svg')}\"></svg>",
    "textarea": f"</textarea><script>{MARK.format('pwned-textarea')}</script>",
    "cdata": f"]]><script>{MARK.format('pwned-cdata')}</script>",
    "details": f"</pre></details></li></ol></section><script>{MARK.format('pwned-close')}</script>",
    "link": "<a id=\"pwned-link\" href=\"javascript:document.title='pwned'\">open the rota</a>",
    "iframe": f"<iframe srcdoc=\"<script>{MARK.format('pwned-iframe')}</script>\"></iframe>",
    "style": "<style>body{display:none}</style>",
    "comment": "<!-- a comment opener would hide the rest of the page",
}
EXECUTING = ["pwned-script", "pwned-img", "pwned-svg", "pwned-textarea", "pwned-cdata", "pwned-close"]
AFTER_COMMENT = "Sentinel sentence after the comment opener: still visible."
# A file name may carry markup too (anything but a slash is allowed on Linux).
HOSTILE_NAME = "\"'><svg onload=document.title='pwned-name'>.txt"


def _run(drive: Path, store: Path, definition=None) -> dict:
    return pipeline.run(definition or load_definition(), str(drive), str(store), workers=1, quiet=True)


@pytest.fixture(scope="module")
def review(tmp_path_factory, prefect_harness):
    """The demo drive plus a re-saved copy of the volunteer rota (other bytes, same text)."""
    base = tmp_path_factory.mktemp("report")
    drive = base / "drive"
    shutil.copytree(SAMPLE, drive)
    rota = (drive / "volunteers" / "volunteer-rota-spring-2026.txt").read_text(encoding="utf-8")
    resaved = drive / "volunteers" / "volunteer-rota-spring-2026.windows.txt"
    resaved.write_bytes(rota.replace("\n", "\r\n").encode())
    # Re-saved a day before the rota's last edit, so dedup keeps the rota's own chunks.
    when = (drive / "volunteers" / "volunteer-rota-spring-2026.txt").stat().st_mtime - 86_400
    os.utime(resaved, (when, when))
    manifest = _run(drive, base / "store")
    store = Store(base / "store")
    done = write_report(store, base / "out" / "review.html")
    return {"store": store, "manifest": manifest, "html": done.summary.read_text(encoding="utf-8"),
            "path": done.summary, "folder": done.folder, "drive": drive, "written": done}


def _hostile_text() -> str:
    lines = ["Rota desk notes", "", "Questions go to rota.desk@quillfern.example before Friday.",
             "The \ufb01rst Saturday rota starts in March.", ""]  # NFKC in clean unfolds the ligature
    lines += [f"{name}: {payload}" for name, payload in VECTORS.items()]
    return "\n".join(lines) + "\n" + AFTER_COMMENT + "\n"


@pytest.fixture(scope="module")
def hostile(tmp_path_factory, prefect_harness):
    """Markup and script in a .txt, a .md and an .html file, under a changed chain."""
    base = tmp_path_factory.mktemp("hostile")
    drive = base / "drive"
    drive.mkdir()
    (drive / "notes.txt").write_text(_hostile_text(), encoding="utf-8")
    (drive / HOSTILE_NAME).write_text("A file whose name is markup.\n" + VECTORS["img"] + "\n", encoding="utf-8")
    # Raw HTML in Markdown is dropped by the extractor; code spans and fences keep it as text.
    (drive / "minutes.md").write_text(
        f"# Minutes `{VECTORS['img']}`\n\n```html\n{VECTORS['script']}\n```\n\n"
        f"The meeting closed at nine. {VECTORS['link']}\n\n"
        f"## Actions `{VECTORS['textarea']}`\n\nBook the room again for the spring term. `{VECTORS['comment']}`\n",
        encoding="utf-8")
    esc = {k: v.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;") for k, v in VECTORS.items()}
    (drive / "page.html").write_text(
        f"<html><head><title>{esc['script']}</title></head><body><h1>{esc['svg']} Opening hours</h1>"
        f"<p>The branch opens at nine. {esc['cdata']} {esc['details']}</p><p>{esc['style']} {esc['comment']}</p>"
        "</body></html>", encoding="utf-8")
    data = yaml.safe_load(default_config_text())
    data["steps"] = [s for s in data["steps"] if s["step"] not in ("language", "dedup")]
    data["steps"].insert(1, {"step": "example_steps:MASK_EMAILS"})
    data["steps"].insert(2, {"step": "example_steps:HTML_ONLY"})
    definition = build_definition(data, "test")
    first = _run(drive, base / "store", definition)
    store = Store(base / "store")
    before = write_report(store, base / "hostile.html")
    pages_before = {f.name: (f.stat().st_ino, f.read_bytes()) for f in before.folder.iterdir()}
    (drive / "added-later.txt").write_text("A note added after the first run, about the van timetable.\n")
    second = _run(drive, base / "store", definition)
    notes_doc = next(r["doc_id"] for r in store.catalog().to_pylist() if r["source_path"] == "notes.txt")
    rerun = pipeline.run(definition, str(drive), str(base / "store"), workers=1, quiet=True,
                         rerun={"doc_id": notes_doc, "page": None, "step": None})
    done = write_report(store, base / "hostile.html")
    return {"store": store, "first": first, "second": second, "rerun": rerun, "path": done.summary,
            "folder": done.folder, "html": done.summary.read_text(encoding="utf-8"), "base": base,
            "before": before, "pages_before": pages_before, "written": done, "notes_doc": notes_doc}


# ----------------------------------------------------------------------------- Chromium

def _chromium() -> str:
    exe = shutil.which("chromium")
    if exe is None:
        pytest.fail("chromium is not installed: the review page's browser checks need the Debian package "
                    "`chromium` (make system-deps installs it)", pytrace=False)
    return exe


def _browse(page: Path, work: Path, *mode: str) -> subprocess.CompletedProcess:
    work.mkdir(parents=True, exist_ok=True)
    cmd = [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={work / 'profile'}", *mode, page.resolve().as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=240)
    assert done.returncode == 0, f"chromium exited {done.returncode}: {done.stderr[-2000:]}"
    return done


def dump_dom(page: Path, work: Path):
    """The page's DOM after Chromium loaded it (and ran whatever it would run)."""
    out = _browse(page, work, "--dump-dom").stdout
    assert "<html" in out, f"chromium printed no DOM: {out[:500]!r}"
    return lxml.html.fromstring(out)


def _ran(dom) -> list[str]:
    """Traces of executed payloads in a DOM."""
    found = [m for m in EXECUTING + ["pwned-iframe"] if dom.xpath(f"//{m}")]
    title = dom.findtext(".//title") or ""
    if "pwned" in title:
        found.append(f"title changed to {title!r}")
    return found


# ----------------------------------------------------------------------------- errors

def test_a_store_without_a_committed_run_is_a_one_line_error(tmp_path):
    with pytest.raises(ReportError) as err:
        write_report(Store(tmp_path / "empty"), tmp_path / "r.html")
    assert "no committed run" in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "r.html").exists() and not pages_folder(tmp_path / "r.html").exists()


def test_an_unknown_run_and_a_folder_as_output_are_one_line_errors(review, tmp_path):
    with pytest.raises(ReportError, match="no committed run 'nosuchrun'"):
        write_report(review["store"], tmp_path / "r.html", run_id="nosuchrun")
    with pytest.raises(ReportError, match="is a folder"):
        write_report(review["store"], tmp_path)


# ----------------------------------------------------------------------------- reading the pages

def _doc(html: str):
    return lxml.html.fromstring(html)


def _read(path: Path):
    return _doc(path.read_text(encoding="utf-8"))


def _list_rows(folder: Path) -> list:
    """Every row of the documents list, over all its pages, in order."""
    rows = []
    n = 1
    while (folder / f"list-{n}.html").exists():
        rows += _read(folder / f"list-{n}.html").get_element_by_id("documents-table").xpath("./tbody/tr")
        n += 1
    return rows


def _row_path(tr) -> str:
    return tr.xpath("./td[1]/a")[0].text_content()


def _doc_page(folder: Path, doc_id: str):
    return _read(folder / f"{doc_id}.html")


def _figure_table(dom, key: str) -> list[list[str]]:
    rows = dom.get_element_by_id(key).xpath(".//table/tbody/tr")
    return [[c.text_content().strip() for c in r.xpath("./td")] for r in rows]


def test_summary_states_the_runs_figures(review):
    m = review["manifest"]
    dom = _doc(review["html"])
    summary = dom.get_element_by_id("summary").text_content()
    assert m["run_id"] in summary
    cards = {c.findtext("span"): c.findtext("b") for c in dom.get_element_by_id("summary").find_class("card")}
    files = sum(1 for p in review["drive"].rglob("*") if p.is_file() and not p.name.startswith("."))
    assert cards["files seen"] == str(m["documents"]["files"]) == str(files)
    assert cards["distinct documents"] == str(m["documents"]["distinct"])
    assert cards["chunks handed off"] == f"{m['chunks']:,}"
    assert cards["tokens"] == f"{m['tokens']:,}"
    assert cards["chunks to upsert"] == str(m["changes"]["upsert"])
    # The demo drive's image named .txt and the zip of minutes (its members are the
    # documents): skipped, not failures.
    assert cards["files skipped (not documents)"] == "2"
    for component in ("prefect", "pyarrow", "tiktoken"):
        assert m["versions"][component] in summary


def test_status_chart_matches_the_runs_own_counts(review):
    # The run's manifest counted its current view itself; the page reads the store again.
    dom = _doc(review["html"])
    head = [th.text_content() for th in dom.get_element_by_id("chart-status").xpath(".//table/thead/tr/th")]
    got = {}
    for row in _figure_table(dom, "chart-status"):
        by = {head[i]: int(v.replace(",", "")) for i, v in enumerate(row) if i >= 2 and head[i] != "total"}
        got[row[0]] = {k: v for k, v in by.items() if v}
    assert got == review["manifest"]["current"]
    assert list(got) == [s["name"] for s in review["manifest"]["definition"]["steps"]]  # chain order
    svg = dom.get_element_by_id("chart-status").find(".//svg")
    # 4 broken files fail; the PNG named .txt is skipped as an image, the zip as a container
    assert "extract" in svg.findtext("desc") and "4 failed, 0 dropped, 2 skipped" in svg.findtext("desc")


def test_tokens_languages_and_chunk_sizes_agree_with_the_handoff(review):
    handoff = review["store"].handoff().to_pylist()
    dom = _doc(review["html"])
    per_doc = Counter()
    for r in handoff:
        per_doc[r["source_path"]] += r["token_count"]
    table = {}
    for tr in _list_rows(review["folder"]):
        cells = [td.text_content().strip() for td in tr.xpath("./td")]
        table[_row_path(tr)] = int(cells[4].replace(",", ""))
    assert {p: n for p, n in table.items() if n} == dict(per_doc)
    langs = Counter(r["language"] for r in handoff)
    assert {row[0]: int(row[1]) for row in _figure_table(dom, "chart-languages")} == dict(langs)
    assert {"en", "de", "fr"} <= set(langs)
    hist = _figure_table(dom, "chart-chunk-sizes")
    assert sum(int(n.replace(",", "")) for _, n in hist) == len(handoff)
    for label, n in hist:
        low, high = (int(x) for x in label.split("–"))
        assert int(n) == sum(1 for r in handoff if low <= r["token_count"] <= high), label
    tok_rows = _figure_table(dom, "chart-tokens")
    assert tok_rows[0][0] == max(per_doc, key=per_doc.get)  # the largest document comes first


def test_documents_list_has_one_row_per_live_document_with_status_and_reason(review):
    store = review["store"]
    live = {r["doc_id"] for r in store.catalog().to_pylist() if r["present"]}
    rows = _list_rows(review["folder"])
    assert {r.get("id")[len("row-"):] for r in rows} == live and len(rows) == len(live)

    def problem(tr) -> str:
        return "".join(d.text_content() for d in tr.find_class("problem"))

    by_path = {_row_path(r): r for r in rows}
    protected = by_path["hr/salary-review-2026-protected.pdf"]
    assert protected.xpath("./td[7]")[0].text_content() == "failed"
    assert problem(protected) == "extract: password protected"
    assert [td.text_content() for td in by_path["policies/lending-policy-2026.pdf"].xpath("./td")[1:3]] == ["pdf", "2"]
    assert problem(by_path["policies/lending-policy-2026.pdf"]) == ""  # no empty reason line for an ok document
    handbook = [r for p, r in by_path.items() if "branch-operations-handbook" in p]
    assert len(handbook) == 1 and "same bytes also at" in handbook[0].text_content()
    copy = by_path["volunteers/volunteer-rota-spring-2026.windows.txt"]
    assert copy.xpath("./td[7]")[0].text_content() == "dropped"
    assert problem(copy).startswith("dedup: copy of document volunteers/volunteer-rota")
    # Worst first: every failed row comes before every ok row.
    statuses = [r.xpath("./td[7]")[0].text_content() for r in rows]
    assert statuses.index("ok") > max(i for i, s in enumerate(statuses) if s == "failed")
    # Each row links to its document's page, which exists beside the list.
    for r in rows:
        href = r.xpath("./td[1]/a/@href")[0]
        assert href == f"{r.get('id')[len('row-'):]}.html" and (review["folder"] / href).is_file()
    # The summary shows only the documents that need a look, linked into the folder.
    summary = _doc(review["html"]).get_element_by_id("documents-table").xpath("./tbody/tr")
    assert {_row_path(r) for r in summary} == {_row_path(r) for r in rows
                                               if r.xpath("./td[7]")[0].text_content() != "ok"}
    assert all(r.xpath("./td[1]/a/@href")[0].startswith(review["folder"].name + "/") for r in summary)


def test_paths_break_only_after_a_slash_and_the_reason_sits_under_the_path(review):
    # A path is long and one word to the browser: break-all cut it anywhere; now the
    # only break points are after its slashes (a <wbr>), and the cell takes most of the row.
    css = (Path(__file__).resolve().parents[1] / "flows" / "report_templates" / "report.css").read_text()
    assert "break-all" not in css and "td.pathcell{width:55%}" in css
    rows = _list_rows(review["folder"])
    html = (review["folder"] / "list-1.html").read_text(encoding="utf-8")
    for r in rows:
        assert '<span class="path">' + "/<wbr>".join(_row_path(r).split("/")) + "</span>" in html
    head = [th.text_content() for th in _read(review["folder"] / "list-1.html").xpath("//thead/tr/th")]
    assert head == ["path", "format", "pages", "chunks", "tokens", "language", "status"]


def _pane_text(el) -> str:
    """The text a pane stands for: marks for line breaks dropped, code points put back."""
    out = [el.text or ""]
    for child in el:
        if child.get("class") == "cp":
            label = child.text_content()
            out.append(chr(int(label[2:], 16)) if label.startswith("U+") else "")
        else:
            out.append(_pane_text(child))
        out.append(child.tail or "")
    return "".join(out)


def test_each_document_page_shows_pages_side_by_side_and_its_chunks(review):
    store = review["store"]
    clean = {(r["source_path"], r["locator"]): r for r in store.current("clean", "pages").to_pylist()}
    extract = {(r["source_path"], r["locator"]): r for r in store.current("extract", "pages").to_pylist()}
    readme_doc = extract[("README.txt", "file")]["doc_id"]
    dom = _doc_page(review["folder"], readme_doc)
    page = dom.get_element_by_id(f"p-{readme_doc}-file")
    panes = page.find_class("pane")
    assert len(panes) == 2
    assert panes[0].findtext("h4") == "as extracted (extract)"
    assert "after clean" in panes[1].findtext("h4")
    # Outside the marks, the left pane is the extracted text and the right one the cleaned text.
    assert _pane_text(panes[0].find(".//pre")) == extract[("README.txt", "file")]["text"]
    assert _pane_text(panes[1].find(".//pre")) == clean[("README.txt", "file")]["text"]
    before, after = extract[("README.txt", "file")]["text"], clean[("README.txt", "file")]["text"]
    assert before != after  # clean changes this file (whitespace at least), so there is something to mark
    removed = "".join(_pane_text(d) for d in page.xpath(".//del[@class='rm']"))
    inserted = "".join(_pane_text(i) for i in page.xpath(".//ins[@class='add']"))
    assert removed or inserted
    assert len(before) - len(removed) + len(inserted) == len(after)
    counts = page.xpath(".//details[@class='cmp']/summary")[0].text_content()
    assert f"{len(removed):,} characters removed, {len(inserted):,} inserted" in counts
    section = dom.get_element_by_id(f"d-{readme_doc}")
    chunks = section.xpath(".//ol[@class='chunks']/li")
    split = [r for r in store.current("tokens", "chunks").to_pylist() if r["doc_id"] == readme_doc]
    assert len(chunks) == len(split) >= 1
    assert f"{split[0]['token_count']:,} tokens" in chunks[0].text_content()
    assert " › ".join(split[0]["heading_path"]) in chunks[0].text_content()
    # The method of a PDF page is on the page; its removed running lines fold into one
    # line with a count, the lines themselves behind a disclosure, not repeated as warnings.
    pdf = extract[("policies/lending-policy-2025.pdf", "page/1")]
    pdf_dom = _doc_page(review["folder"], pdf["doc_id"])
    pdf_page = pdf_dom.get_element_by_id(f"p-{pdf['doc_id']}-page-1")
    assert pdf["method"] in pdf_page.text_content()
    assert pdf["removed"], "the demo PDF has running lines (tools/make_sample_drive.py)"
    folded = pdf_page.xpath(".//details[contains(@class, 'removed')]")
    assert len(folded) == 1
    n = len(pdf["removed"])
    assert folded[0].findtext("summary").startswith(f"removed {n} line")
    assert [li.xpath(".//q")[0].text_content() for li in folded[0].xpath(".//li")] == [r["text"] for r in pdf["removed"]]
    assert "dropped running header/footer" not in pdf_page.text_content()


def test_dropped_chunks_link_to_the_chunk_they_duplicate(review):
    dedup = {r["chunk_id"]: r for r in review["store"].current("dedup", "chunks").to_pylist()}
    dropped = [r for r in dedup.values() if r["status"] == "dropped"]
    assert dropped
    links = []
    for doc_id in {r["doc_id"] for r in dropped}:
        links += _doc_page(review["folder"], doc_id).find_class("duplink")
    assert len(links) == len(dropped)
    for a in links:
        li = next(a.iterancestors("li"))
        own = li.get("id")[len("c-"):]
        kept = dedup[own]["duplicate_of"]
        page, anchor = a.get("href").split("#")
        assert page == f"{dedup[kept]['doc_id']}.html" and anchor == f"c-{kept}"
        hit = _read(review["folder"] / page).get_element_by_id(anchor)  # the anchor resolves ...
        assert hit.tag == "li" and "st-ok" in hit.get("class")  # ... to the kept chunk on its document's page


# ----------------------------------------------------------------------------- text comparison

def test_comparison_marks_removed_and_inserted_text_and_shows_invisible_characters():
    before = "The \ufb01rst  branch\u00ad opens at nine.\n\n\nLast line"
    after = "The first branch opens at nine.\n\nLast line"
    body, removed, inserted = render_comparison(before, after, "as extracted (extract)", "after clean")
    dom = _doc(body)
    dels = [d.text_content() for d in dom.xpath("//del")]
    ins = [i.text_content() for i in dom.xpath("//ins")]
    assert any("\ufb01rst" in d for d in dels) and "first" in ins
    assert any("U+00AD" in d for d in dels)  # a soft hyphen is invisible; its code point is shown
    assert any("↵" in d for d in dels)  # so is a removed line break
    assert "Last line" not in "".join(dels + ins)  # unchanged text is not marked
    assert removed > 0 and inserted > 0


def test_comparison_segments_rebuild_both_texts():
    # Seeded random pairs over a small alphabet, so lines, words, spaces and invisible
    # characters collide often; every pair must come apart into both texts exactly.
    rng = random.Random(6)
    for _ in range(400):
        a = "".join(rng.choice("ab \n.\u00ad\ufb01") for _ in range(rng.randint(0, 60)))
        b = "".join(rng.choice("ab \n.fi") for _ in range(rng.randint(0, 60)))
        segs = diff_segments(a, b)
        assert "".join(s[1] for s in segs) == a and "".join(s[2] for s in segs) == b, (a, b)
        assert all(sa == sb for op, sa, sb in segs if op == "equal"), (a, b)
        assert all(op != "equal" or sa for op, sa, _ in segs), (a, b)


# ----------------------------------------------------------------------------- generic stages

def test_own_and_format_limited_stages_show_and_absent_ones_are_not_invented(hostile):
    dom = _doc(hostile["html"])
    stages = [row[0] for row in _figure_table(dom, "chart-status")]
    assert stages == [s["name"] for s in hostile["second"]["definition"]["steps"]]  # chain order
    assert {"mask_emails", "html_only"} <= set(stages) and not {"language", "dedup"} & set(stages)
    section = _doc_page(hostile["folder"], hostile["notes_doc"]).get_element_by_id(
        f"d-{hostile['notes_doc']}").text_content()
    assert "passed by (not for this format): html_only" in section
    assert "notes masked 1" in section  # the own step's notes column
    assert "after mask_emails, clean" in section  # both stages that changed the text are named
    langs = _figure_table(dom, "chart-languages")
    assert [r[0] for r in langs] == ["unknown"]  # no language step: said, not guessed


# ----------------------------------------------------------------------------- runs covered

def test_after_a_rerun_the_report_shows_the_state_of_the_store_and_names_its_runs(hostile):
    # The rerun saw no files itself; the summary takes the scan from the run before it.
    second, rerun = hostile["second"], hostile["rerun"]
    assert rerun["kind"] == "rerun" and rerun["documents"]["files"] == 0
    dom = _doc(hostile["html"])
    assert dom.findtext(".//title") == f"thresher review: run {second['run_id']} + 1 rerun"
    summary = dom.get_element_by_id("summary")
    cards = {c.findtext("span"): c.findtext("b") for c in summary.find_class("card")}
    assert cards["files seen"] == str(second["documents"]["files"]) == "5"
    assert cards["distinct documents"] == "5"
    assert cards["processed (run and reruns)"] == str(second["documents"]["processed"] + 1)
    covers = summary.xpath(".//tr[th='covers']/td")[0].text_content()
    assert second["run_id"] in covers and rerun["run_id"] in covers and hostile["first"]["run_id"] not in covers
    assert "re-ran 1 of 5 live documents" in covers


def test_the_report_of_an_older_run_shows_the_store_as_that_run_left_it(hostile, tmp_path):
    store = hostile["store"]
    old = write_report(store, tmp_path / "old.html", run_id=hostile["first"]["run_id"])
    paths_old = sorted(_row_path(r) for r in _list_rows(old.folder))
    paths_new = sorted(_row_path(r) for r in _list_rows(hostile["folder"]))
    assert "added-later.txt" in paths_new and "added-later.txt" not in paths_old
    assert len(paths_new) == len(paths_old) + 1
    dom = _read(old.summary)
    assert dom.findtext(".//title") == f"thresher review: run {hostile['first']['run_id']}"
    assert "older run" in dom.get_element_by_id("summary").text_content()


# ----------------------------------------------------------------------------- the folder

def test_a_second_report_into_the_folder_writes_only_the_pages_of_changed_documents(hostile):
    # Between the two reports: one file added (its page is new) and one document re-run
    # (its page is written again); the other three pages are left as they were, the
    # very same files.
    before, after = hostile["before"], hostile["written"]
    assert before.pages_written == 4 and before.documents == 4
    assert after.documents == 5 and after.pages_written == 2 and after.pages_kept == 3
    added = next(r["doc_id"] for r in hostile["store"].catalog().to_pylist() if r["source_path"] == "added-later.txt")
    kept = {name for name in hostile["pages_before"] if name.endswith(".html") and not name.startswith("list-")}
    kept -= {f"{hostile['notes_doc']}.html"}
    assert len(kept) == 3
    for name in kept:
        f = hostile["folder"] / name
        assert (f.stat().st_ino, f.read_bytes()) == hostile["pages_before"][name], name
    notes = hostile["folder"] / f"{hostile['notes_doc']}.html"
    assert notes.stat().st_ino != hostile["pages_before"][notes.name][0]
    assert (hostile["folder"] / f"{added}.html").is_file()
    # The re-run document's page shows the rerun's attempt.
    assert hostile["rerun"]["run_id"] in notes.read_text(encoding="utf-8") or "attempt 2" in notes.read_text(
        encoding="utf-8")


def test_pages_of_documents_gone_from_the_store_are_removed_and_a_lost_page_is_written_again(hostile, tmp_path):
    out = tmp_path / "r.html"
    first = write_report(hostile["store"], out, run_id=hostile["second"]["run_id"])
    assert first.pages_written == 5
    lost = sorted(first.folder.glob("*.html"))[0]
    lost.unlink()
    stray = first.folder / ("ab" * 32 + ".html")  # a page of a document the store no longer holds
    stray.write_text("old page")
    again = write_report(hostile["store"], out, run_id=hostile["second"]["run_id"])
    assert again.pages_written == 1 and again.pages_removed == 1
    assert lost.is_file() and not stray.exists()
    assert (first.folder / STATE_FILE).is_file()


def test_the_summary_holds_no_document_text(hostile):
    # The summary stays small whatever the drive: the texts live on the documents' pages.
    assert AFTER_COMMENT not in hostile["html"]
    assert AFTER_COMMENT in (hostile["folder"] / f"{hostile['notes_doc']}.html").read_text(encoding="utf-8")


# ----------------------------------------------------------------------------- the browser

def test_control_page_proves_the_browser_would_show_executed_payloads(tmp_path):
    # Without this, "nothing ran" could just mean the check cannot see it.
    page = tmp_path / "control.html"
    page.write_text("<!DOCTYPE html><html><head><title>control</title></head><body>"
                    + "".join(v for k, v in VECTORS.items() if k != "comment") + "</body></html>")
    ran = _ran(dump_dom(page, tmp_path / "chromium"))
    assert set(EXECUTING) <= set(ran), ran


def _without_csp(page: Path, where: Path) -> Path:
    """A copy of a page with its Content-Security-Policy taken out: escaping alone must hold."""
    html = page.read_text(encoding="utf-8")
    csp = '<meta http-equiv="Content-Security-Policy"'
    policy = _doc(html).xpath("//meta[@http-equiv='Content-Security-Policy']/@content")
    assert html.count(csp) == 1 and len(policy) == 1, page
    assert "script-src 'none'" in policy[0] and "default-src 'none'" in policy[0]
    start = html.index(csp)
    out = where / page.name
    out.write_text(html[:start] + html[html.index(">", start) + 1:], encoding="utf-8")
    return out


def test_nothing_in_the_documents_runs_in_chromium_and_the_pages_render(hostile, tmp_path):
    folder = hostile["folder"]
    pages = [hostile["path"], folder / "list-1.html"] + sorted(
        f for f in folder.glob("*.html") if not f.name.startswith("list-"))
    assert len(pages) == 7
    bare = tmp_path / "without-csp"
    bare.mkdir()
    text = ""
    headings: list[str] = []
    for page in pages:
        for variant in (page, _without_csp(page, bare)):
            dom = dump_dom(variant, tmp_path / f"{variant.parent.name}-{variant.stem}")
            assert _ran(dom) == [], f"{variant}: {_ran(dom)}"
            assert dom.findtext(".//title").startswith("thresher review: run ")
            assert dom.xpath("//script | //iframe | //img | //a[@id='pwned-link']") == []
            assert len(dom.xpath("//style")) == 1
            assert dom.xpath("//@*[starts-with(name(), 'on')]") == []
            # Links stay inside the report: anchors, its own pages, the summary.
            for h in dom.xpath("//a/@href"):
                assert re.fullmatch(r"(#[\w-]+|[\w.-]+\.html(#[\w-]+)?|../hostile\.html|hostile-pages/[\w.-]+)", h), h
            if variant is page:
                text += dom.text_content()
                headings += [h.text_content() for h in dom.find_class("heading")]
    # The pages rendered: every document has its row and its page, and the markup from
    # the files is there as text.
    rows = _list_rows(folder)
    assert len(rows) == len(pages) - 2 == 5
    for payload in (VECTORS["script"], VECTORS["img"], VECTORS["textarea"], VECTORS["comment"]):
        assert payload in text, payload
    assert AFTER_COMMENT in text
    assert HOSTILE_NAME in text
    # Headings (from the .md) and titles (from the .html) are documents' text too.
    assert any(h.startswith(f"Minutes {VECTORS['img']}") for h in headings), headings
    assert f"{VECTORS['svg']} Opening hours" in headings, headings
    assert "title: " + VECTORS["script"] in text


def test_screenshot_shows_a_drawn_page_and_the_dom_has_every_part(review, tmp_path):
    shot = tmp_path / "review.png"
    _browse(review["path"], tmp_path / "shot", f"--screenshot={shot}", "--window-size=1280,2000")
    assert shot.is_file() and shot.stat().st_size > 20_000
    img = Image.open(shot).convert("RGB")
    assert img.size == (1280, 2000)
    colours = img.getcolors(maxcolors=1 << 20)
    assert len(colours) > 50
    assert max(colours)[0] < 0.8 * img.size[0] * img.size[1]  # not one colour all over
    found = {c for _, c in colours}
    # The header's colour comes from the style block (so the policy's hash let it
    # apply); the ok teal comes from the status chart's SVG.
    assert (0x24, 0x32, 0x4a) in found and (0x2f, 0x8f, 0x83) in found

    dom = dump_dom(review["path"], tmp_path / "dom")
    assert review["manifest"]["run_id"] in dom.get_element_by_id("summary").text_content()
    for key in ("chart-status", "chart-tokens", "chart-languages", "chart-chunk-sizes"):
        fig = dom.get_element_by_id(key)
        svg = fig.find(".//svg")
        assert svg is not None and svg.findtext("title") and svg.findtext("desc"), key
        assert svg.xpath(".//rect"), key
        assert fig.xpath(".//table/tbody/tr"), key  # the text alternative
    # Every link from the summary leads to a file of the report.
    for href in dom.xpath("//a/@href"):
        target = href.split("#")[0]
        assert not target or (review["path"].parent / target).is_file(), href
    # A document's page, drawn: the style applies there too.
    page = next(review["folder"].glob("[0-9a-f]*.html"))
    shot = tmp_path / "doc.png"
    _browse(page, tmp_path / "shot-doc", f"--screenshot={shot}", "--window-size=1280,900")
    assert (0x24, 0x32, 0x4a) in {c for _, c in Image.open(shot).convert("RGB").getcolors(maxcolors=1 << 20)}


def test_documents_inside_documents_link_to_their_container_and_back(review):
    # The demo drive's e-mail holds an attachment, read as a document of its own.
    catalog = review["store"].catalog().to_pylist()
    mail = next(r for r in catalog if r["source_path"] == "mail/2026-03-02-lindle-cross-heating.eml")
    attached = next(r for r in catalog if r["container_doc_id"] == mail["doc_id"])
    assert attached["source_path"] == "mail/2026-03-02-lindle-cross-heating.eml/attachments/1-repair-budget-2026.md"
    page = _doc_page(review["folder"], attached["doc_id"])
    inside = page.get_element_by_id("container")
    assert inside.xpath(".//a/@href") == [f"{mail['doc_id']}.html"]
    assert "mail/2026-03-02-lindle-cross-heating.eml" in inside.text_content()
    assert "attachments/1-repair-budget-2026.md" in inside.text_content()
    holds = _doc_page(review["folder"], mail["doc_id"]).get_element_by_id("holds")
    assert holds.xpath(".//a/@href") == [f"{attached['doc_id']}.html"]
    assert (review["folder"] / f"{attached['doc_id']}.html").exists()


def test_access_and_personal_data_section_counts_kinds_without_values(review):
    dom = _doc(review["html"])
    section = dom.get_element_by_id("access")
    # Chunks by label agree with the hand-off.
    labels = {}
    for r in review["store"].handoff().to_pylist():
        labels[r["label"] or "(no label)"] = labels.get(r["label"] or "(no label)", 0) + 1
    got = {row[0]: int(row[1].replace(",", "")) for row in _figure_table(dom, "chart-labels")}
    assert {k: v for k, v in got.items() if v} == labels
    # Documents by kind: the demo drive's contact list (4 e-mail addresses, 6 phone
    # numbers) and expense claim (2 IBANs), counted, never shown.
    by_kind = {}
    for h in section.xpath(".//h4"):
        rows = h.getnext().xpath("./tbody/tr")
        by_kind[h.get("id")] = {r.xpath("./td")[0].text_content(): r.xpath("./td")[1].text_content() for r in rows}
    assert by_kind["personal-iban"]["finance/2026-02-expense-claim-pellifer.txt"] == "2"
    assert by_kind["personal-phone"]["hr/staff-contact-list.md"] == "6"
    assert by_kind["personal-email"]["hr/staff-contact-list.md"] == "4"
    html = review["html"]
    for value in ("GB34", "0113 496 0214", "tomasz.quenby@quillfern.example"):
        assert value not in html
    access = {r.xpath("./td")[0].text_content(): [c.text_content() for c in r.xpath("./td")[1:]]
              for r in dom.get_element_by_id("access-table").xpath("./tbody/tr")}
    assert access["hr/staff-contact-list.md"] == ["hr", "confidential", "access.rules[0]"]
    assert access["README.txt"] == ["staff", "internal", "access.default"]
