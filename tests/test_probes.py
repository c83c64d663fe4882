"""Retrieval probes: the BM25 ranking against the published formula and an independent
implementation, and probes recorded per run with regressions caught."""

from __future__ import annotations

import glob
import math
import os
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pytest
import yaml

from conftest import REPO
from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.probes import Probe, ProbeError, ProbeIndex, answer_probes, load_probes, probes_rel
from thresher.flows.store import Store
from thresher.steps.bm25 import BM25, terms

THRESHER = str(Path(sys.executable).with_name("thresher"))


def test_bm25_scores_match_the_published_formula_on_a_worked_example():
    # Robertson & Zaragoza, "The Probabilistic Relevance Framework: BM25 and Beyond" (2009),
    # BM25 with the RSJ weight without relevance information, k1 = 1.2, b = 0.75.
    # Worked by hand: N = 5 documents of 3, 5, 7, 4 and 4 terms, avdl = 23 / 5 = 4.6;
    # "opening" and "hours" each in 2 documents, so idf = ln((5 - 2 + 0.5) / (2 + 0.5))
    # = ln 1.4 = 0.336472.
    # d1 (dl 3): K = 1.2 * (0.25 + 0.75 * 3 / 4.6) = 0.886957; per term
    #     (k1 + 1) * 1 / (K + 1) * idf = 2.2 * 0.529954 * 0.336472 = 0.392294; two terms 0.784587.
    # d3 (dl 7): K = 1.2 * (0.25 + 0.75 * 7 / 4.6) = 1.669565; per term
    #     2.2 * 0.374593 * 0.336472 = 0.277289; two terms 0.554578.
    docs = ["library opening hours", "library closed for roof works", "opening hours of the library on sunday",
            "volunteer rota for spring", "fines on children books"]
    index = BM25(docs)
    scores = [s * (index.k1 + 1) for s in index.scores("opening hours")]  # the (k1 + 1) factor of the paper
    assert scores == pytest.approx([0.784587, 0.0, 0.554578, 0.0, 0.0], abs=1e-5)
    assert index.rank("opening hours", 2) == [0, 2]
    assert math.log(1.4) == pytest.approx(index.idf("opening"))


def test_bm25_ranks_real_text_like_an_independent_implementation():
    # Reference: bm25s (PyPI), method "robertson" (Kamphuis et al. 2020's name for the
    # original formula), fed the same terms. Corpus: the copyright files Debian packages
    # install under /usr/share/doc. bm25s floors the RSJ weight at 0 where the paper lets it
    # go negative (terms in more than half of the documents): the plain BM25 is compared on
    # the terms both compute alike, the probes' floored ranking on whole queries.
    bm25s = pytest.importorskip("bm25s")
    files = sorted(glob.glob("/usr/share/doc/*/copyright"))[:400]
    assert len(files) >= 50, "expected Debian's /usr/share/doc/*/copyright files"
    texts = [Path(f).read_text("utf-8", errors="replace") for f in files]
    ours = BM25(texts)
    probe_index = ProbeIndex(texts)
    ref = bm25s.BM25(method="robertson", k1=1.2, b=0.75)
    ref.index([terms(t) for t in texts], show_progress=False)
    for words in ("lesser general 2.1 artistic perl", "public domain dedication", "expat mit x11 permission",
                  "bsd clause redistribution binary", "sublicense merchantability warranty charge"):
        kept = sorted({t for t in terms(words) if ours.idf(t) > 0})
        assert len(kept) >= 2, words
        query = " ".join(kept)
        mine = ours.scores(query)
        theirs = ref.get_scores(kept)
        assert mine == pytest.approx(list(theirs), rel=1e-4, abs=1e-4), query
        top = [i for i in ours.rank(query, 10) if mine[i] > 0]
        ref_top = sorted(range(len(theirs)), key=lambda i: (-theirs[i], i))[:len(top)]
        assert [round(mine[i], 3) for i in top] == [round(float(theirs[i]), 3) for i in ref_top], query
        floored = probe_index.scores(words)
        assert floored == pytest.approx(list(ref.get_scores(sorted(set(terms(words))))), rel=1e-4, abs=1e-4)
        # The probes' ranking from postings orders chunks as the full scores do.
        assert probe_index.rank(words, 20) == sorted(range(len(texts)), key=lambda i: (-floored[i], i))[:20]


def _chunks(rows: list[tuple[str, str, list[str], int | None]]) -> pa.Table:
    return pa.table({"chunk_id": [f"c{i}" for i in range(len(rows))], "source_path": [r[0] for r in rows],
                     "text": [r[1] for r in rows], "heading_path": [r[2] for r in rows],
                     "page_start": [r[3] for r in rows], "page_end": [r[3] for r in rows]})


def test_a_probe_passes_on_its_document_page_and_heading_and_a_lost_one_is_a_regression():
    chunks = _chunks([
        ("ops/handbook.pdf", "Keys are signed out in the key register kept in the office.", ["Keys and alarms"], 3),
        ("ops/handbook.pdf", "The alarm panel is by the staff door.", ["Keys and alarms"], 4),
        ("news/index.html", "Staff news and notices for all branches.", ["Staff news"], None),
        ("ops/rota.txt", "Volunteer shifts for the spring.", [], None),
        ("ops/fines.txt", "Overdue fines on adult books.", [], None),
    ])
    probes = [Probe(ask="where is the key register kept", expect="ops/*.pdf", page=3, heading="keys"),
              Probe(ask="where is the alarm panel", expect="ops/handbook.pdf", page=3),
              Probe(ask="staff news", expect="news/*")]
    first, summary = answer_probes(probes, chunks, "r1")
    rows = first.to_pylist()
    assert [r["rank"] for r in rows] == [1, 2, 1]  # probe 2: the page-3 chunk ranks second
    assert [r["chunk_id"] for r in rows] == ["c0", "c0", "c2"]
    assert summary.hit_at_1 == pytest.approx(2 / 3, abs=1e-4) and summary.hit_at_5 == 1.0 and summary.regressions == []
    # The news page is gone next week: its probe fails and is a regression; the others are not.
    second, summary2 = answer_probes(probes, chunks.slice(0, 2), "r2", previous=first, previous_run="r1")
    assert [r["regression"] for r in second.to_pylist()] == [False, False, True]
    assert summary2.regressions == [3] and summary2.previous_run == "r1"


def test_a_bad_probe_file_names_the_key(tmp_path):
    bad = tmp_path / "p.yaml"
    bad.write_text("questions:\n  - ask: where?\n    expected: x\n", "utf-8")
    with pytest.raises(ProbeError, match=r"questions\[0\]\.expect.*(required|missing)|questions\[0\]\.expected"):
        load_probes(bad)
    assert len(load_probes(REPO / "config" / "demo-probes.yaml")) >= 12


def _definition(probes: str | None = None):
    data = yaml.safe_load(default_config_text())
    data["deliver"] = {"targets": []}
    if probes:
        data["probes"] = probes
    return build_definition(data, "test")


def test_probes_run_after_each_run_and_a_regression_fails_the_cli(prefect_harness, sample_drive, tmp_path):
    from prefect.settings import PREFECT_API_URL

    probe_file = REPO / "config" / "demo-probes.yaml"
    store_dir = tmp_path / "store"
    m = pipeline.run(_definition(str(probe_file)), str(sample_drive), str(store_dir), workers=1, quiet=True)
    assert m["probes"]["count"] == len(load_probes(probe_file))
    assert m["probes"]["hit_at_5"] >= 0.75  # the demo's questions are answerable from its drive
    store = Store(store_dir)
    table = store.read_table(probes_rel(m["run_id"]))
    assert table.num_rows == m["probes"]["count"]
    fault_row = next(r for r in table.to_pylist() if r["expect"] == "intranet/reporting-a-fault.html")
    assert fault_row["passed"] and fault_row["source_path"] == "intranet/reporting-a-fault.html"

    # The fault page disappears from the drive: its probe regresses; the CLI says so.
    (sample_drive / "intranet" / "reporting-a-fault.html").unlink()
    definition_file = tmp_path / "flow.yaml"
    data = yaml.safe_load(default_config_text())
    data["deliver"] = {"targets": []}
    definition_file.write_text(yaml.safe_dump(data), "utf-8")
    env = dict(os.environ, PREFECT_API_URL=PREFECT_API_URL.value())
    out = subprocess.run([THRESHER, "run", "--config", str(definition_file), "--source", str(sample_drive),
                          "--store", str(store_dir), "--quiet", "--probes", str(probe_file), "--fail-on-regression"],
                         capture_output=True, text=True, env=env, timeout=300)
    assert out.returncode == 3, out.stderr
    n = next(r["probe"] for r in table.to_pylist() if r["expect"] == "intranet/reporting-a-fault.html")
    assert f"fail now: {n}" in out.stderr
    assert "regression(s): probe" in out.stdout
    status = subprocess.run([THRESHER, "status", "--config", str(definition_file), "--store", str(store_dir)],
                            capture_output=True, text=True, env=env, timeout=120)
    assert "probes: " in status.stdout and "1 regression(s)" in status.stdout


def test_the_report_lists_probes_regressions_first_and_the_delivery_targets(prefect_harness, sample_drive, tmp_path):
    from thresher.flows.report import write_report

    probe_file = tmp_path / "probes.yaml"
    probe_file.write_text(yaml.safe_dump({"questions": [
        {"ask": "How do I report a broken <b>printer</b> or kiosk?", "expect": "intranet/reporting-a-fault.html"},
        {"ask": "How do I book the community room?", "expect": "forms/meeting-room-booking-form.docx"},
    ]}), "utf-8")
    data = yaml.safe_load(default_config_text())
    data["probes"] = str(probe_file)  # the embedded default's SQLite target stays
    definition = build_definition(data, "test")
    store_dir = tmp_path / "store"
    pipeline.run(definition, str(sample_drive), str(store_dir), workers=1, quiet=True)
    (sample_drive / "intranet" / "reporting-a-fault.html").unlink()
    pipeline.run(definition, str(sample_drive), str(store_dir), workers=1, quiet=True)
    written = write_report(Store(store_dir), tmp_path / "report.html")
    html = written.summary.read_text("utf-8")
    probes = html[html.index('<section id="probes">'):]
    probes = probes[:probes.index("</section>")]
    assert "1 regression" in probes
    # Regressions first, and the question's markup shown as text.
    assert probes.index("broken &lt;b&gt;printer&lt;/b&gt;") < probes.index("community room")
    assert "<b>printer</b>" not in html
    delivery = html[html.index('<section id="delivery">'):]
    assert "local" in delivery and "up to date" in delivery
