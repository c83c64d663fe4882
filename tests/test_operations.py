"""Weekly operations: renames, export, the failure list, two runs at once, killed runs."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from conftest import REPO
from thresher.flows import pipeline
from thresher.flows.config import load_definition
from thresher.flows.failures import failure_groups, reason_kind
from thresher.flows.store import Store

THRESHER = str(Path(sys.executable).with_name("thresher"))


def _run(source: Path, store: Path) -> dict:
    return pipeline.run(load_definition(), str(source), str(store), workers=1, quiet=True)


def _content(table) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "run_id"} for r in table.to_pylist()]


@pytest.fixture()
def harness_api(prefect_harness) -> str:
    """The test harness's Prefect API address, for CLI processes (saves their server start)."""
    from prefect.settings import PREFECT_API_URL

    return PREFECT_API_URL.value()


def _env(api: str, **extra: str) -> dict:
    env = dict(os.environ)
    env["PREFECT_API_URL"] = api
    env["PYTHONPATH"] = os.pathsep.join([str(REPO / "tests"), env.get("PYTHONPATH", "")])
    env.update(extra)
    return env


def test_a_renamed_file_keeps_its_id_and_the_handoff_gets_its_new_path(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _run(sample_drive, store_dir)
    old = "board/2025-11-18-board-minutes.md"
    new = "board/archive/minutes-november-2025.md"
    (sample_drive / new).parent.mkdir()
    (sample_drive / old).rename(sample_drive / new)
    m = _run(sample_drive, store_dir)
    assert m["documents"]["processed"] == 0 and m["documents"]["removed"] == 0
    store = Store(store_dir)
    cat = {r["source_path"]: r for r in store.catalog().to_pylist()}
    assert cat[old]["present"] is False and cat[new]["present"] is True
    assert cat[old]["doc_id"] == cat[new]["doc_id"]
    rows = [r for r in store.handoff().to_pylist() if r["doc_id"] == cat[new]["doc_id"]]
    assert rows and {r["source_path"] for r in rows} == {new}
    changes = pq.read_table(store_dir / "handoff" / "changes" / f"{m['run_id']}.parquet").to_pylist()
    assert {c["action"] for c in changes} == {"upsert"} and len(changes) == len(rows)


def test_export_writes_the_live_chunks_as_parquet_and_jsonl(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _run(sample_drive, store_dir)
    handoff = Store(store_dir).handoff()
    for fmt in ("parquet", "jsonl"):
        out = tmp_path / f"chunks.{fmt}"
        r = subprocess.run([THRESHER, "export", "--format", fmt, "--out", str(out), "--store", str(store_dir)],
                           capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        assert f"wrote {handoff.num_rows} chunks" in r.stderr
    assert _content(pq.read_table(tmp_path / "chunks.parquet")) == _content(handoff)
    lines = (tmp_path / "chunks.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(lines) == handoff.num_rows
    first = json.loads(lines[0])
    assert set(first) == set(handoff.column_names)
    assert isinstance(first["token_counts"], dict) and first["token_counts"]["cl100k_base"] == first["token_count"]
    assert any("é" in json.loads(line)["text"] for line in lines)  # not \\u-escaped: readable French
    r = subprocess.run([THRESHER, "export", "--format", "parquet", "--out", "-", "--store", str(store_dir)],
                       capture_output=True, text=True)
    assert r.returncode == 2 and "only --format jsonl can be written to standard output" in r.stderr


def test_failures_are_grouped_by_reason_kind(prefect_harness, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    _run(sample_drive, store_dir)
    groups = failure_groups(Store(store_dir))
    failed = [g for g in groups if g.status == "failed"]
    assert {g.units[0]["source_path"] for g in failed} >= {"hr/salary-review-2026-protected.pdf",
                                                           "it/scanner-log.txt"}
    assert all(g.stage == "extract" for g in failed)
    assert groups.index(failed[-1]) < len(groups)  # failures come before drops
    assert reason_kind("exact duplicate of chunk 2cbdf9b4e137745f66781ffd5bd4fe61 in policies/a-2025.pdf") == \
        reason_kind("exact duplicate of chunk 3b03e0e8763d21c13a005aeaa95f6dd9 in policies/b-2025.pdf")
    r = subprocess.run([THRESHER, "failures", "--store", str(store_dir), "--status", "failed"],
                       capture_output=True, text=True)
    assert r.returncode == 0
    assert "failed at extract" in r.stdout and "password protected" in r.stdout
    assert "dropped at" not in r.stdout
    # One header per stage and status, each kind of reason under it, reasons in full.
    assert r.stdout.count("failed at extract:") == 1
    assert f"failed at extract: {sum(len(g.units) for g in failed)} unit(s)" in r.stdout
    r = subprocess.run([THRESHER, "failures", "--store", str(store_dir)], capture_output=True, text=True)
    assert "dropped at dedup" in r.stdout and "copy of document volunteers/volunteer-rota-spring-2026.txt" in r.stdout
    assert "<path>" not in r.stdout and "<id>" not in r.stdout and "…" not in r.stdout


def test_a_second_run_on_the_same_store_is_refused_while_the_first_works(harness_api, sample_drive, tmp_path):
    store_dir = tmp_path / "store"
    flow = tmp_path / "slow.yaml"
    flow.write_text(
        "steps:\n"
        "  - step: example_steps:STUBBORN_EXTRACT\n    params: {time_limit_seconds: 8}\n"
        "  - step: clean\n  - step: language\n  - step: split\n  - step: dedup\n  - step: tokens\n")
    (sample_drive / "slow.txt").write_text("PLEASE HANG so that this run holds the store for a while.\n")
    first = subprocess.Popen([THRESHER, "run", "--config", str(flow), "--source", str(sample_drive),
                              "--store", str(store_dir), "--quiet"], env=_env(harness_api),
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not (store_dir / ".lock").exists():
        assert time.monotonic() < deadline and first.poll() is None, "the first run never took the lock"
        time.sleep(0.2)
    second = subprocess.run([THRESHER, "run", "--source", str(sample_drive), "--store", str(store_dir), "--quiet"],
                            env=_env(harness_api), capture_output=True, text=True, timeout=120)
    assert second.returncode == 2
    assert len(second.stderr.strip().splitlines()) == 1
    assert "is in use by run" in second.stderr and "wait for it to finish" in second.stderr
    out, err = first.communicate(timeout=180)
    assert first.returncode == 0, err
    store = Store(store_dir)
    assert len(store.runs()) == 1
    slow = [r for r in store.current("extract", "pages").to_pylist() if r["source_path"] == "slow.txt"]
    assert slow[0]["reason"].startswith("time limit: extract was stopped after 8.") and "over its limit of 8 s" in slow[0]["reason"]
    assert not (store_dir / ".lock").exists()


# Runs killed at every write boundary: tests/test_faults.py.
