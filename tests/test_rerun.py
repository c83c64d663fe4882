"""Re-running chosen units: only they and what depends on them are recomputed."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pytest
import yaml

from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.rerun import RerunError, make_rerun_plan, target_for_document
from thresher.flows.store import Store

from conftest import SAMPLE

HANDBOOK = "operations/branch-operations-handbook.pdf"
COMPILATION = "books/handbook-compilation.pdf"


COPIES = 180  # handbooks in the compilation: 1,260 pages
# A time limit far too low for the compilation and far above any demo file: in stop 28
# the compilation's extraction took 5.6 s on a quiet machine (a direct call), and the
# slowest demo file 0.21 s in its worker (the slide deck; `make demo`'s document_ms).
LOW_LIMIT = 1.5


def _add_compilation(drive: Path, copies: int = COPIES) -> None:
    """A 1,260-page PDF (the demo handbook 180 times): its extraction takes seconds even
    on a quiet machine. Extraction keeps getting faster: 210 pages once fitted in 3 s,
    and 630 pages came to 3.0 s, so the test that relied on them failed by chance."""
    import pypdfium2 as pdfium

    src = pdfium.PdfDocument(str(drive / "operations" / "branch-operations-handbook.pdf"))
    dst = pdfium.PdfDocument.new()
    for _ in range(copies):
        dst.import_pages(src)
    (drive / COMPILATION).parent.mkdir(parents=True)
    dst.save(str(drive / COMPILATION))
    # Older than the handbook it repeats, so dedup keeps the handbook's chunks (keep: newest).
    os.utime(drive / COMPILATION, (1_700_000_000, 1_700_000_000))  # November 2023
STAGES = [("extract", "pages"), ("clean", "pages"), ("language", "pages"), ("split", "chunks"),
          ("dedup", "chunks"), ("tokens", "chunks")]


def _definition(time_limit: float):
    data = yaml.safe_load(default_config_text())
    data["steps"][0]["params"]["time_limit_seconds"] = time_limit
    return build_definition(data, "test")


def _files(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*.parquet"))
            if "/staged/" not in str(p) and not str(p.relative_to(root)).startswith(("handoff/", "catalog"))}


def _current_rows(store: Store, exclude_doc: str) -> dict[str, list[dict]]:
    out = {}
    for stage, unit in STAGES:
        rows = [r for r in store.current(stage, unit).to_pylist() if r["doc_id"] != exclude_doc]
        out[stage] = sorted(rows, key=lambda r: r["unit_id"])
    return out


def test_a_document_failed_by_a_too_low_time_limit_is_rerun_alone(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _add_compilation(sample_drive)
    pipeline.run(_definition(LOW_LIMIT), str(sample_drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    cat = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
    handbook = cat[COMPILATION]
    rows = store.current("extract", "pages", [handbook]).to_pylist()
    assert [r["status"] for r in rows] == ["failed"]
    assert rows[0]["reason"].startswith("time limit: extract was stopped after ")
    assert f"over its limit of {LOW_LIMIT:g} s" in rows[0]["reason"]
    assert not any(r["doc_id"] == handbook for r in store.handoff().to_pylist())

    before_files = _files(store_dir)
    before_rows = _current_rows(store, handbook)

    # The fix is a config change; the re-run touches that one document only.
    m = pipeline.run(_definition(120), str(sample_drive), str(store_dir), quiet=True,
                     rerun={"doc_id": handbook, "page": None, "step": None})
    assert m["kind"] == "rerun" and m["documents"]["processed"] == 1
    store = Store(store_dir)
    after_files = _files(store_dir)
    for path, digest in before_files.items():
        assert after_files.get(path) == digest, f"{path} changed"
    new = set(after_files) - set(before_files)
    assert new and all(m["run_id"] in p for p in new)
    assert _current_rows(store, handbook) == before_rows

    pages = store.current("extract", "pages", [handbook]).to_pylist()
    assert len(pages) == 7 * COPIES and all(r["status"] == "ok" and r["attempt"] == 1 for r in pages)
    # The failed unit stays for audit as an older attempt.
    all_rows = store.stage_rows("extract", "pages", [handbook]).to_pylist()
    assert sorted(r["status"] for r in all_rows) == ["failed"] + ["ok"] * (7 * COPIES)
    # Its chunks went through the later steps too: every one repeats the handbook, so the
    # corpus-wide dedup drops them all in favour of the handbook's, and the index has
    # nothing new to take.
    dedup = store.current("dedup", "chunks", [handbook]).to_pylist()
    assert len(dedup) > 30 and {r["status"] for r in dedup} == {"dropped"}
    kept = {r["chunk_id"] for r in store.handoff().to_pylist() if r["source_path"] == HANDBOOK}
    assert {r["duplicate_of"] for r in dedup} <= kept
    assert m["changes"] == {"upsert": 0, "delete": 0}


def test_rerun_targets_name_the_failed_step_or_the_whole_document(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    definition = _definition(120)
    pipeline.run(definition, str(sample_drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    cat = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
    scan = cat["finance/2026-01-14-receipt-stationery-scan.pdf"]
    t = target_for_document(definition, store, scan, "finance/...", page=1, step_name=None)
    assert (t.step, t.locators) == (0, ["page/1"])
    protected = cat["hr/salary-review-2026-protected.pdf"]
    t = target_for_document(definition, store, protected, "hr/...", page=1, step_name=None)
    assert t.locators is None and "whole document" in t.why
    t = target_for_document(definition, store, cat["README.txt"], "README.txt", page=None, step_name="split")
    assert (definition.steps[t.step].name, t.locators) == ("split", None)
    # A file edited since it was catalogued cannot be re-run from its old bytes.
    (sample_drive / "README.txt").write_text("changed\n")
    from thresher.flows.plan import live_documents

    _, live, copies = live_documents(store.catalog().to_pylist(), {r.run_id: r.sequence for r in store.runs()}, 99)
    with pytest.raises(RerunError, match="changed since it was catalogued"):
        make_rerun_plan(store, [target_for_document(definition, store, cat["README.txt"],
                                                    "README.txt", None, "extract")],
                        str(sample_drive), live, copies)


def test_one_scanned_page_is_rerun_alone_after_turning_ocr_on(prefect_harness, sample_drive, tmp_path):
    import pypdfium2 as pdfium

    from reportlab.pdfgen import canvas

    # A three-page PDF whose middle page is the demo drive's scanned receipt (no text
    # layer); pages 1 and 3 are a note written here, so nothing else on the drive repeats them.
    note = tmp_path / "note.pdf"
    c = canvas.Canvas(str(note), invariant=1)
    for n, lines in enumerate([["Stationery claim for the Lindle Cross branch, January 2026.",
                                "The receipt attached on the next page covers printer paper and labels."],
                               ["Approved by the branch supervisor on 20 January 2026.",
                                "Filed with the quarterly petty cash return for the finance officer."]]):
        for i, line in enumerate(lines):
            c.drawString(72, 720 - 18 * i, line)
        c.showPage()
    c.save()
    dst = pdfium.PdfDocument.new()
    text_pages = pdfium.PdfDocument(str(note))
    dst.import_pages(text_pages, [0])
    dst.import_pages(pdfium.PdfDocument(str(sample_drive / "finance" / "2026-01-14-receipt-stationery-scan.pdf")))
    dst.import_pages(text_pages, [1])
    dst.save(str(sample_drive / "finance" / "filed-policy-with-receipt.pdf"))
    store_dir = tmp_path / "store"
    pipeline.run(_definition(120), str(sample_drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    doc = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}["finance/filed-policy-with-receipt.pdf"]
    pages = {r["page"]: r for r in store.current("extract", "pages", [doc]).to_pylist()}
    assert pages[2]["status"] == "failed" and "OCR is not enabled" in pages[2]["reason"]
    assert pages[1]["status"] == pages[3]["status"] == "ok"
    before_files = _files(store_dir)
    before_rows = _current_rows(store, doc)

    data = yaml.safe_load(default_config_text())
    data["steps"][0]["params"]["ocr"] = True
    with_ocr = build_definition(data, "test-ocr")
    m = pipeline.run(with_ocr, str(sample_drive), str(store_dir), quiet=True,
                     rerun={"doc_id": doc, "page": 2, "step": None})
    store = Store(store_dir)
    # The whole PDF was read again (running lines and headings need every page), but only
    # page 2's row was written; pages 1 and 3 keep their rows from the first run.
    written = [r for r in store.stage_rows("extract", "pages", [doc]).to_pylist() if r["run_id"] == m["run_id"]]
    assert [r["page"] for r in written] == [2]
    pages = {r["page"]: r for r in store.current("extract", "pages", [doc]).to_pylist()}
    assert pages[2]["status"] == "ok" and pages[2]["method"] == "ocr" and pages[2]["attempt"] == 2
    assert "TOTAL" in pages[2]["text"].upper()
    assert pages[1]["run_id"] == pages[3]["run_id"] != m["run_id"]
    for path, digest in before_files.items():
        assert _files(store_dir).get(path) == digest, f"{path} changed"
    assert _current_rows(store, doc) == before_rows
    # The document's later steps now include the receipt's text.
    assert any("TOTAL" in (r["text"] or "").upper() for r in store.current("split", "chunks", [doc]).to_pylist())


def test_rerun_failed_redoes_every_failed_unit_and_nothing_else(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _add_compilation(sample_drive)
    pipeline.run(_definition(LOW_LIMIT), str(sample_drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    failed_before = {r["doc_id"] for r in store.current("extract", "pages").to_pylist() if r["status"] == "failed"}
    cat = {r["doc_id"]: r["source_path"] for r in store.catalog().to_pylist()}
    assert {cat[d] for d in failed_before} >= {COMPILATION, "hr/salary-review-2026-protected.pdf", "it/scanner-log.txt"}
    untouched = _current_rows(store, exclude_doc="")  # every row, to compare the others after
    m = pipeline.run(_definition(120), str(sample_drive), str(store_dir), quiet=True, rerun={"failed": True})
    store = Store(store_dir)
    assert m["documents"]["processed"] == len(failed_before)
    rows = {r["doc_id"]: r for r in store.current("extract", "pages").to_pylist()}
    comp = {d for d, p in cat.items() if p == COMPILATION}.pop()
    assert rows[comp]["status"] == "ok"  # fixed by the higher limit
    protected = {d for d, p in cat.items() if p == "hr/salary-review-2026-protected.pdf"}.pop()
    assert rows[protected]["status"] == "failed" and rows[protected]["attempt"] == 2
    assert rows[protected]["reason"] == "password protected"  # still broken, same reason, new attempt
    for stage, before in untouched.items():
        after = {r["unit_id"]: r for r in _current_rows(store, exclude_doc="")[stage]}
        for r in before:
            if r["doc_id"] not in failed_before and stage in ("extract", "clean", "language", "split"):
                assert after[r["unit_id"]] == r  # documents that had not failed are as they were


def test_a_page_rerun_hands_the_next_step_every_page_when_no_corpus_step_follows(prefect_harness, tmp_path):
    # Without the boilerplate step after extract the re-run page goes straight on to clean
    # in the same batch: clean must get it merged with the document's stored other pages.
    drive = tmp_path / "drive"
    (drive / "operations").mkdir(parents=True)
    name = "operations/branch-operations-handbook.pdf"
    (drive / name).write_bytes((SAMPLE / name).read_bytes())
    data = yaml.safe_load(default_config_text())
    data["steps"] = [s for s in data["steps"] if s["step"] != "boilerplate"]
    definition = build_definition(data, "no-corpus-page-step")
    assert [s.name for s in definition.steps][:2] == ["extract", "clean"]
    store_dir = tmp_path / "store"
    pipeline.run(definition, str(drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    doc = store.catalog().to_pylist()[0]["doc_id"]
    before = {r["page"]: r["text"] for r in store.current("clean", "pages", [doc]).to_pylist()}
    chunks_before = sorted((r["chunk_id"], r["text"]) for r in store.handoff().to_pylist())
    assert sorted(before) == list(range(1, 8))

    m = pipeline.run(definition, str(drive), str(store_dir), quiet=True, rerun={"doc_id": doc, "page": 2, "step": None})
    store = Store(store_dir)
    extract = [r for r in store.stage_rows("extract", "pages", [doc]).to_pylist() if r["run_id"] == m["run_id"]]
    assert [r["page"] for r in extract] == [2]
    clean = {r["page"]: r for r in store.current("clean", "pages", [doc]).to_pylist()}
    assert sorted(clean) == list(range(1, 8)) and {p: r["text"] for p, r in clean.items()} == before
    assert all(r["run_id"] == m["run_id"] for r in clean.values())  # clean saw the whole document again
    assert sorted((r["chunk_id"], r["text"]) for r in store.handoff().to_pylist()) == chunks_before
