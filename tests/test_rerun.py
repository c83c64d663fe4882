"""Re-running chosen units: only they and what depends on them are recomputed."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
import yaml

from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.rerun import RerunError, make_rerun_plan, target_for_document
from thresher.flows.store import Store

HANDBOOK = "archive/2025/branch-operations-handbook.pdf"
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
    # 0.3 s is too little for the 7-page handbook's PDF parsing (about 0.5 s here).
    pipeline.run(_definition(0.3), str(sample_drive), str(store_dir), workers=1, quiet=True)
    store = Store(store_dir)
    cat = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
    handbook = cat[HANDBOOK]
    rows = store.current("extract", "pages", [handbook]).to_pylist()
    assert [r["status"] for r in rows] == ["failed"]
    assert rows[0]["reason"].startswith("time limit: extract was stopped after 0.3 s")
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
    assert len(pages) == 7 and all(r["status"] == "ok" and r["attempt"] == 1 for r in pages)
    # The failed unit stays for audit as an older attempt.
    all_rows = store.stage_rows("extract", "pages", [handbook]).to_pylist()
    assert sorted(r["status"] for r in all_rows) == ["failed"] + ["ok"] * 7
    handoff = store.handoff().to_pylist()
    assert sum(1 for r in handoff if r["doc_id"] == handbook) > 10
    changes = m["changes"]
    assert changes["delete"] == 0 and changes["upsert"] == sum(1 for r in handoff if r["doc_id"] == handbook)


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
    with pytest.raises(RerunError, match="changed since it was catalogued"):
        make_rerun_plan(definition, store, [target_for_document(definition, store, cat["README.txt"],
                                                                "README.txt", None, "extract")],
                        str(sample_drive), 99)
