"""The review page (`thresher report`): its figures against the store, its text
comparison, its escaping proved in a real headless Chromium, and its look.

Two stores, each built by the real flow: the demo drive plus a re-saved copy of one
file (so dedup drops chunks that the page must link to what they duplicate), and a
small drive of files full of markup and script, run with a changed chain (an own
step, a format-limited step, no language or dedup step) and then run again after a
file is added, so the page of an older run can be checked.
"""

from __future__ import annotations

import random
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
from thresher.flows.report import ReportError, build_report, write_report
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
    (drive / "volunteers" / "volunteer-rota-spring-2026.windows.txt").write_bytes(rota.replace("\n", "\r\n").encode())
    manifest = _run(drive, base / "store")
    store = Store(base / "store")
    out = write_report(store, base / "out" / "review.html")
    return {"store": store, "manifest": manifest, "html": out.read_text(encoding="utf-8"), "path": out,
            "drive": drive}


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
    (drive / "added-later.txt").write_text("A note added after the first run, about the van timetable.\n")
    second = _run(drive, base / "store", definition)
    store = Store(base / "store")
    out = write_report(store, base / "hostile.html")
    return {"store": store, "first": first, "second": second, "path": out,
            "html": out.read_text(encoding="utf-8"), "base": base}


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
    assert not (tmp_path / "r.html").exists()


def test_an_unknown_run_and_a_folder_as_output_are_one_line_errors(review, tmp_path):
    with pytest.raises(ReportError, match="no committed run 'nosuchrun'"):
        write_report(review["store"], tmp_path / "r.html", run_id="nosuchrun")
    with pytest.raises(ReportError, match="is a folder"):
        write_report(review["store"], tmp_path)


# ----------------------------------------------------------------------------- figures

def _doc(html: str):
    return lxml.html.fromstring(html)


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
    assert "extract" in svg.findtext("desc") and "5 failed" in svg.findtext("desc")


def test_tokens_languages_and_chunk_sizes_agree_with_the_handoff(review):
    handoff = review["store"].handoff().to_pylist()
    dom = _doc(review["html"])
    per_doc = Counter()
    for r in handoff:
        per_doc[r["source_path"]] += r["token_count"]
    table = {}
    for tr in dom.get_element_by_id("documents-table").xpath("./tbody/tr"):
        cells = [td.text_content().strip() for td in tr.xpath("./td")]
        table[tr.xpath("./td[1]/a")[0].text_content()] = int(cells[4].replace(",", ""))
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


def test_documents_table_has_one_row_per_live_document_with_status_and_reason(review):
    store = review["store"]
    live = {r["doc_id"] for r in store.catalog().to_pylist() if r["present"]}
    dom = _doc(review["html"])
    rows = dom.get_element_by_id("documents-table").xpath("./tbody/tr")
    assert {r.get("id")[len("row-"):] for r in rows} == live and len(rows) == len(live)
    by_path = {r.xpath("./td[1]/a")[0].text_content(): [td.text_content().strip() for td in r.xpath("./td")]
               for r in rows}
    protected = by_path["hr/salary-review-2026-protected.pdf"]
    assert protected[6] == "failed" and protected[7] == "extract: password protected"
    assert by_path["policies/lending-policy-2026.pdf"][1:3] == ["pdf", "2"]
    handbook = [r for r in rows if "branch-operations-handbook" in r.xpath("./td[1]/a")[0].text_content()]
    assert len(handbook) == 1 and "same bytes also at" in handbook[0].text_content()
    copy = by_path["volunteers/volunteer-rota-spring-2026.windows.txt"]
    assert copy[6] == "dropped" and copy[7].startswith("dedup: copy of document volunteers/volunteer-rota")
    # Worst first: every failed row comes before every ok row.
    statuses = [r.xpath("./td[7]")[0].text_content() for r in rows]
    assert statuses.index("ok") > max(i for i, s in enumerate(statuses) if s == "failed")


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


def test_each_document_section_shows_pages_side_by_side_and_its_chunks(review):
    dom = _doc(review["html"])
    store = review["store"]
    clean = {(r["source_path"], r["locator"]): r for r in store.current("clean", "pages").to_pylist()}
    extract = {(r["source_path"], r["locator"]): r for r in store.current("extract", "pages").to_pylist()}
    readme_doc = extract[("README.txt", "file")]["doc_id"]
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
    # The warnings and method of a PDF page are on the page.
    pdf = extract[("policies/lending-policy-2025.pdf", "page/1")]
    pdf_page = dom.get_element_by_id(f"p-{pdf['doc_id']}-page-1").text_content()
    assert "dropped running header/footer" in pdf_page and pdf["method"] in pdf_page


def test_dropped_chunks_link_to_the_chunk_they_duplicate(review):
    dom = _doc(review["html"])
    dedup = {r["chunk_id"]: r for r in review["store"].current("dedup", "chunks").to_pylist()}
    links = dom.find_class("duplink")
    dropped = [r for r in dedup.values() if r["status"] == "dropped"]
    assert dropped and len(links) == len(dropped)
    for a in links:
        li = next(a.iterancestors("li"))
        own = li.get("id")[len("c-"):]
        target = a.get("href")[1:]
        assert target == f"c-{dedup[own]['duplicate_of']}"
        hit = dom.get_element_by_id(target)  # the anchor resolves ...
        assert hit.tag == "li" and "st-ok" in hit.get("class")
        section = next(hit.iterancestors("section"))  # ... to the kept chunk in its own document's section
        assert section.get("id") == f"d-{dedup[dedup[own]['duplicate_of']]['doc_id']}"


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
    notes = hostile["store"].current("extract", "pages").to_pylist()
    notes_doc = next(r["doc_id"] for r in notes if r["source_path"] == "notes.txt")
    section = dom.get_element_by_id(f"d-{notes_doc}").text_content()
    assert "passed by (not for this format): html_only" in section
    assert "notes masked 1" in section  # the own step's notes column
    assert "after mask_emails, clean" in section  # both stages that changed the text are named
    langs = _figure_table(dom, "chart-languages")
    assert [r[0] for r in langs] == ["unknown"]  # no language step: said, not guessed


def test_the_page_of_an_older_run_shows_the_store_as_that_run_left_it(hostile):
    store = hostile["store"]
    old = _doc(build_report(store, hostile["first"]["run_id"]))
    new = _doc(hostile["html"])

    def paths(dom):
        return sorted(a.text_content() for a in dom.xpath("//table[@id='documents-table']/tbody/tr/td[1]/a"))

    assert "added-later.txt" in paths(new) and "added-later.txt" not in paths(old)
    assert len(paths(new)) == len(paths(old)) + 1
    assert hostile["first"]["run_id"] in old.findtext(".//title")
    assert "older run" in old.get_element_by_id("summary").text_content()


# ----------------------------------------------------------------------------- the browser

def test_control_page_proves_the_browser_would_show_executed_payloads(tmp_path):
    # Without this, "nothing ran" could just mean the check cannot see it.
    page = tmp_path / "control.html"
    page.write_text("<!DOCTYPE html><html><head><title>control</title></head><body>"
                    + "".join(v for k, v in VECTORS.items() if k != "comment") + "</body></html>")
    ran = _ran(dump_dom(page, tmp_path / "chromium"))
    assert set(EXECUTING) <= set(ran), ran


def test_nothing_in_the_documents_runs_in_chromium_and_the_page_renders(hostile, tmp_path):
    html = hostile["html"]
    csp = '<meta http-equiv="Content-Security-Policy"'
    policy = _doc(html).xpath("//meta[@http-equiv='Content-Security-Policy']/@content")
    assert html.count(csp) == 1 and len(policy) == 1
    assert "script-src 'none'" in policy[0] and "default-src 'none'" in policy[0]
    without_csp = tmp_path / "without-csp.html"  # escaping alone must hold, not only the policy
    start = html.index(csp)
    without_csp.write_text(html[:start] + html[html.index(">", start) + 1:], encoding="utf-8")
    for page in (hostile["path"], without_csp):
        dom = dump_dom(page, tmp_path / page.stem)
        assert _ran(dom) == [], f"{page.name}: {_ran(dom)}"
        assert dom.findtext(".//title").startswith("thresher review: run ")
        assert dom.xpath("//script | //iframe | //img | //a[@id='pwned-link']") == []
        assert len(dom.xpath("//style")) == 1
        assert dom.xpath("//@*[starts-with(name(), 'on')]") == []
        assert [h for h in dom.xpath("//a/@href") if not h.startswith("#")] == []
        # The page rendered: every document has its row and its section, and the
        # markup from the files is there as text.
        rows = dom.xpath("//table[@id='documents-table']/tbody/tr")
        assert len(rows) == len(dom.xpath("//section[contains(@class, 'doc')]")) == 5
        text = dom.text_content()
        for payload in (VECTORS["script"], VECTORS["img"], VECTORS["textarea"], VECTORS["comment"]):
            assert payload in text, payload
        assert AFTER_COMMENT in text
        assert HOSTILE_NAME in text
        # Headings (from the .md) and titles (from the .html) are documents' text too.
        headings = [h.text_content() for h in dom.find_class("heading")]
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
    live = {r["doc_id"] for r in review["store"].catalog().to_pylist() if r["present"]}
    rows = dom.xpath("//table[@id='documents-table']/tbody/tr")
    assert len(rows) == len(live)
    ids = set(dom.xpath("//@id"))
    for row in rows:
        href = row.xpath("./td[1]/a/@href")[0]
        assert href[1:] in ids and dom.get_element_by_id(href[1:]).tag == "section"
    assert len(dom.xpath("//section[contains(@class, 'doc')]")) == len(live)
    dup = dom.find_class("duplink")
    assert dup and all(a.get("href")[1:] in ids for a in dup)
