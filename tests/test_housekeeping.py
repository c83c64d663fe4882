"""Compaction and retention on real runs of the demo drive: rows and the current view
unchanged, fewer files, old attempts gone, the store verifies clean, and the next run
reaches the same hand-off as on a store never touched."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from datetime import datetime, timezone
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from conftest import SAMPLE
from thresher.flows import pipeline
from thresher.flows.config import load_definition

from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.flows.store import Store
from thresher.flows.summary import stages_of
from thresher.flows.verify import verify
from thresher.steps.units import Block, Page

THRESHER = str(Path(sys.executable).with_name("thresher"))
MINUTES = "board/2026-01-20-board-minutes.md"


def _run(source: Path, store: Path) -> dict:
    return pipeline.run(load_definition(), str(source), str(store), workers=1, quiet=True)


def _edit(drive: Path, n: int) -> None:
    f = drive / MINUTES
    f.write_text(f.read_text() + f"\n\n## Item {n}\n\nThe Quillfern board noted change number {n}.\n")


def _content(table) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "run_id"} for r in table.to_pylist()]


def _sorted(rows: list[dict]) -> list[dict]:
    return sorted(rows, key=lambda r: (r["unit_id"], r["run_id"], r["attempt"]))


def _views(store_dir: Path) -> tuple[dict, dict]:
    """Per stage: the current view, and every row of every attempt."""
    store = Store(store_dir)
    current, every = {}, {}
    for stage, unit in stages_of(store.latest_run().manifest):
        current[stage] = _sorted(store.current(stage, unit).to_pylist())
        every[stage] = _sorted(store.stage_rows(stage, unit).to_pylist())
    return current, every


@pytest.fixture(scope="module")
def three_runs(prefect_harness, tmp_path_factory) -> tuple[Path, Path]:
    """A store that has seen three runs, each with one document changed; and its drive."""
    root = tmp_path_factory.mktemp("upkeep")
    drive = root / "drive"
    shutil.copytree(SAMPLE, drive)
    for n in range(3):
        if n:
            _edit(drive, n)
        _run(drive, root / "store")
    return root / "store", drive


@pytest.fixture()
def store_dir(three_runs, tmp_path) -> Path:
    shutil.copytree(three_runs[0], tmp_path / "store")
    return tmp_path / "store"


@pytest.fixture()
def drive(three_runs, tmp_path) -> Path:
    shutil.copytree(three_runs[1], tmp_path / "drive")
    return tmp_path / "drive"


def test_compaction_keeps_every_row_and_the_view_in_fewer_files(store_dir, drive, tmp_path):
    current, every = _views(store_dir)
    handoff = _content(Store(store_dir).handoff())
    before = len(list((store_dir / "stages").rglob("part-*.parquet")))
    r = subprocess.run([THRESHER, "compact", "--store", str(store_dir), "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    done = json.loads(r.stdout)
    stages = {d["stage"] for d in done}
    assert "extract" in stages and all(d["parts_after"] == 1 for d in done)
    after = len(list((store_dir / "stages").rglob("part-*.parquet")))
    assert after < before
    assert not list((store_dir / "stages" / "extract").glob("2*/part-*.parquet"))  # old per-run parts gone
    assert _views(store_dir) == (current, every)
    assert _content(Store(store_dir).handoff()) == handoff
    assert verify(Store(store_dir)) == []
    # The next run on the compacted store reaches what it reaches on an untouched copy.
    _edit(drive, 9)
    _run(drive, store_dir)
    assert verify(Store(store_dir)) == []
    clean = tmp_path / "clean"
    _run(drive, clean)
    assert _content(Store(store_dir).handoff()) == _content(Store(clean).handoff())


def test_retention_drops_old_attempts_but_not_the_current_view(store_dir, drive, tmp_path):
    current, every = _views(store_dir)
    handoff = _content(Store(store_dir).handoff())
    runs = [r.run_id for r in Store(store_dir).runs()]
    listing = sorted(str(p) for p in store_dir.rglob("*"))
    dry = subprocess.run([THRESHER, "retain", "--store", str(store_dir), "--keep-runs", "1", "--dry-run", "--json"],
                         capture_output=True, text=True)
    assert dry.returncode == 0, dry.stderr
    planned = json.loads(dry.stdout)
    assert sorted(str(p) for p in store_dir.rglob("*")) == listing  # a dry run changes nothing
    assert planned["kept_runs"] == runs[-1:] and planned["rows_dropped"]["extract"] > 0
    assert planned["bytes_freed"] > 0 and len(planned["changes"]) == 2

    r = subprocess.run([THRESHER, "retain", "--store", str(store_dir), "--keep-runs", "1"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert "old attempt row(s)" in r.stdout and "bytes freed" in r.stdout
    cur_after, every_after = _views(store_dir)
    needed = set(Store(store_dir).catalog().column("doc_id").to_pylist())
    assert {k: [x for x in v if x["doc_id"] in needed] for k, v in current.items()} == cur_after
    assert _content(Store(store_dir).handoff()) == handoff
    for stage, rows in every.items():
        old = [x for x in rows if x["run_id"] != runs[-1] and (x not in current[stage] or x["doc_id"] not in needed)]
        assert _sorted([x for x in rows if x not in old]) == every_after[stage]
        assert len(old) == planned["rows_dropped"].get(stage, 0)
    assert planned["rows_dropped"]["extract"] == 2  # the two earlier versions of the edited minutes
    # The first run still holds current rows (most documents never changed): it stays.
    assert [x.run_id for x in Store(store_dir).runs()] == [runs[0], runs[2]]
    assert sorted(p.stem for p in (store_dir / "handoff" / "changes").glob("*.parquet")) == [runs[2]]
    assert verify(Store(store_dir)) == []
    _edit(drive, 9)
    _run(drive, store_dir)
    clean = tmp_path / "clean"
    _run(drive, clean)
    assert _content(Store(store_dir).handoff()) == _content(Store(clean).handoff())
    assert verify(Store(store_dir)) == []


def test_retention_needs_to_be_told_what_to_keep(store_dir):
    r = subprocess.run([THRESHER, "retain", "--store", str(store_dir)], capture_output=True, text=True)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "--keep-runs" in r.stderr
    r = subprocess.run([THRESHER, "retain", "--store", str(store_dir), "--since", "last week"],
                       capture_output=True, text=True)
    assert r.returncode == 2 and "expected a date" in r.stderr


def _pages(run_id: str, doc: str, n: int, attempt: int):
    ctx = RowContext(run_id, doc, f"{doc}.txt", "extract", "1", "d1", "pages", None,
                     datetime(2026, 1, 1, tzinfo=timezone.utc), 1.0, {})
    rows = [to_row(ctx, Page(locator=f"page/{i + 1}", page=i + 1, blocks=[Block("paragraph", f"{doc} {i} {attempt}")]))
            for i in range(n)]
    return rows_to_table("extract", "pages", rows)


def test_a_compacted_stage_is_sorted_so_one_document_read_prunes_row_groups(tmp_path, monkeypatch):
    from thresher.flows import housekeeping

    monkeypatch.setattr(housekeeping, "ROW_GROUP_ROWS", 50)
    store = Store(tmp_path / "s")
    docs = [f"doc{i:03d}" for i in range(40)]
    for r in range(4):
        run_id = f"r{r}"
        for b in range(0, 40, 10):
            for d in docs[b:b + 10]:
                store.write_stage_part("extract", run_id, f"{b}-{d}", _pages(run_id, d, 12, r), [(d, "document")])
        store.commit(run_id, {"run_id": run_id, "sequence": r + 1, "publish": {},
                              "definition": {"steps": [{"name": "extract", "unit": "pages"}]}})
    want = store.current("extract", "pages", ["doc017"]).to_pylist()
    wanted = {d: store.current("extract", "pages", [d]).to_pylist() for d in ("doc000", "doc023", "doc039")}
    housekeeping.compact(store)
    rec = store.compaction("extract")
    part = next(p for p in rec["files"] if p.endswith("part-00000.parquet"))
    meta = pq.ParquetFile(tmp_path / "s" / part).metadata
    col = meta.schema.to_arrow_schema().get_field_index("doc_id")
    ranges = [(meta.row_group(i).column(col).statistics.min, meta.row_group(i).column(col).statistics.max)
              for i in range(meta.num_row_groups)]
    assert meta.num_row_groups >= 30 and ranges == sorted(ranges)
    assert all(a[1] <= b[0] for a, b in zip(ranges, ranges[1:]))  # disjoint: a lookup reads 1-2 groups
    assert sum(1 for lo, hi in ranges if lo <= "doc017" <= hi) <= 2
    assert Store(tmp_path / "s").current("extract", "pages", ["doc017"]).to_pylist() == want
    # A new reader (nothing cached, as a `thresher trail` process) looks up only the
    # documents' own entries of the compacted ledger, which is sorted by doc_id.
    ledger = pq.read_table(tmp_path / "s" / next(p for p in rec["files"] if p.endswith("ledger.parquet")))
    assert ledger.column("doc_id").to_pylist() == sorted(ledger.column("doc_id").to_pylist())
    from thresher.flows import store as store_module

    for d, rows in wanted.items():
        store_module._COMPACTED.clear()
        assert Store(tmp_path / "s").current("extract", "pages", [d]).to_pylist() == rows
        assert not store_module._COMPACTED  # the whole ledger was not loaded


def test_retention_removes_the_probe_results_of_the_runs_it_removes(store_dir, drive):
    probes = str(Path(__file__).resolve().parents[1] / "config" / "demo-probes.yaml")
    for n in (7, 8):
        _edit(drive, n)
        pipeline.run(load_definition(), str(drive), str(store_dir), workers=1, quiet=True, probes=probes)
    runs = [r.run_id for r in Store(store_dir).runs()]
    assert (store_dir / "probes" / f"{runs[-2]}.parquet").exists()
    r = subprocess.run([THRESHER, "retain", "--store", str(store_dir), "--keep-runs", "1"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    left = [x.run_id for x in Store(store_dir).runs()]
    # The fourth run's only rows were an edit the fifth replaced: it goes, and its
    # probe results with it; the newest results stay for the next run to compare.
    assert runs[-2] not in left and runs[-1] in left
    assert sorted(p.stem for p in (store_dir / "probes").glob("*.parquet")) == [runs[-1]]
    assert verify(Store(store_dir)) == []
