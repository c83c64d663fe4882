"""The stage store on its own: commits, the current view, the lock, recovery."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from datetime import datetime, timezone
from pathlib import Path

import pyarrow as pa
import pytest

from thresher.flows import schema
from thresher.flows.rows import RowContext, rows_to_table, to_row, unit_id
from thresher.flows.store import Store, StoreLocked, forget_cached_ledgers
from thresher.steps.units import Block, Page


def _pages(run_id: str, doc: str, texts: dict[str, str], attempts: dict[str, int] | None = None) -> pa.Table:
    ctx = RowContext(run_id, doc, f"{doc}.txt", "extract", "1", "d1", "pages", None,
                     datetime(2026, 1, 1, tzinfo=timezone.utc), 1.0, attempts or {})
    rows = [to_row(ctx, Page(locator=loc, page=i + 1, blocks=[Block("paragraph", t)]))
            for i, (loc, t) in enumerate(texts.items())]
    return rows_to_table("extract", "pages", rows)


def _commit(store: Store, run_id: str) -> None:
    store.commit(run_id, {"run_id": run_id, "sequence": store.next_sequence(), "publish": {}})


def _current_texts(store: Store, doc: str, include_run: str | None = None) -> dict[str, str]:
    t = store.current("extract", "pages", [doc], include_run=include_run)
    return dict(zip(t.column("locator").to_pylist(), t.column("text").to_pylist()))


def test_uncommitted_run_is_invisible_until_its_manifest_exists(tmp_path):
    store = Store(tmp_path / "s")
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one"}), [("docA", "document")])
    assert _current_texts(store, "docA") == {}
    # ...but the run itself can read what it wrote so far.
    assert _current_texts(store, "docA", include_run="r1") == {"page/1": "one"}
    _commit(store, "r1")
    assert _current_texts(Store(tmp_path / "s"), "docA") == {"page/1": "one"}


def test_whole_document_rewrite_retires_units_the_new_run_did_not_produce(tmp_path):
    store = Store(tmp_path / "s")
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one", "page/2": "two"}),
                           [("docA", "document")])
    _commit(store, "r1")
    store.write_stage_part("extract", "r2", "a", _pages("r2", "docA", {"page/1": "uno"}), [("docA", "document")])
    _commit(store, "r2")
    assert _current_texts(store, "docA") == {"page/1": "uno"}
    # The same from the whole stage's current view (no document named).
    whole = store.current("extract", "pages")
    assert whole.column("text").to_pylist() == ["uno"]
    # Old attempts stay for audit.
    all_rows = store.stage_rows("extract", "pages", ["docA"])
    assert all_rows.num_rows == 3


def test_unit_rewrite_overlays_one_page_and_counts_the_attempt(tmp_path):
    store = Store(tmp_path / "s")
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one", "page/2": "two"}),
                           [("docA", "document")])
    _commit(store, "r1")
    attempts = store.max_attempts("extract", "pages", ["docA"])
    assert set(attempts.values()) == {1}
    t = _pages("r2", "docA", {"page/2": "two, repaired"}, attempts)
    # A rerun of page 2 only: page 1 must stay current from r1.
    t = t.set_column(t.schema.get_field_index("page"), "page", pa.array([2], pa.int32()))
    store.write_stage_part("extract", "r2", "a", t, [("docA", "units")])
    _commit(store, "r2")
    cur = store.current("extract", "pages", ["docA"]).to_pylist()
    by_loc = {r["locator"]: r for r in cur}
    assert by_loc["page/1"]["text"] == "one" and by_loc["page/1"]["run_id"] == "r1"
    assert by_loc["page/2"]["text"] == "two, repaired" and by_loc["page/2"]["attempt"] == 2


def test_doc_filter_reads_one_document_only(tmp_path):
    store = Store(tmp_path / "s")
    for doc in ("docA", "docB", "docC"):
        store.write_stage_part("extract", "r1", doc, _pages("r1", doc, {"page/1": doc}), [(doc, "document")])
    _commit(store, "r1")
    t = store.current("extract", "pages", ["docB"])
    assert t.column("doc_id").to_pylist() == ["docB"]


def test_unit_ids_are_content_and_locator_hashes_not_row_numbers():
    a = unit_id("d" * 64, "extract", "page/1")
    assert a == unit_id("d" * 64, "extract", "page/1")
    assert a != unit_id("d" * 64, "extract", "page/2")
    assert a != unit_id("d" * 64, "clean", "page/1")
    assert len(a) == 32 and int(a, 16) >= 0


def test_second_writer_is_refused_with_a_reason(tmp_path):
    store = Store(tmp_path / "s")
    store.acquire_lock("r1")
    with pytest.raises(StoreLocked, match="in use by run r1"):
        Store(tmp_path / "s").acquire_lock("r2")
    store.release_lock("r1")
    Store(tmp_path / "s").acquire_lock("r2")  # free again


def test_lock_left_by_a_dead_process_is_taken_over(tmp_path):
    root = tmp_path / "s"
    code = ("import sys; from thresher.flows.store import Store; Store(sys.argv[1]).acquire_lock('dead')")
    subprocess.run([sys.executable, "-c", code, str(root)], check=True)  # exits holding the lock
    holder = json.loads((root / ".lock").read_text())
    assert holder["run_id"] == "dead"
    Store(root).acquire_lock("alive")
    assert json.loads((root / ".lock").read_text())["pid"] == os.getpid()


def _racer(name: str, roots: list[str], barrier, results) -> None:
    wins = []
    for i, root in enumerate(roots):
        barrier.wait()  # both processes go for the same lock at the same moment
        try:
            Store(root).acquire_lock(f"{name}-{i}")
            wins.append(i)
        except StoreLocked:
            pass
    results.put((name, wins))


@pytest.mark.parametrize("left_by_a_dead_run", [False, True], ids=["fresh", "stale"])
def test_two_processes_racing_for_the_lock_never_both_get_it(tmp_path, left_by_a_dead_run):
    import multiprocessing as mp
    import socket

    rounds = 150
    roots = [str(tmp_path / f"s{i}") for i in range(rounds)]
    if left_by_a_dead_run:
        dead = subprocess.Popen([sys.executable, "-c", "pass"])
        dead.wait()
        for root in roots:
            os.makedirs(root)
            (Path(root) / ".lock").write_text(json.dumps({"run_id": "dead", "pid": dead.pid,
                                                          "host": socket.gethostname()}))
    ctx = mp.get_context("spawn")
    barrier, results = ctx.Barrier(2), ctx.Queue()
    procs = [ctx.Process(target=_racer, args=(name, roots, barrier, results)) for name in ("a", "b")]
    for p in procs:
        p.start()
    wins = dict(results.get(timeout=240) for _ in procs)
    for p in procs:
        p.join(timeout=60)
    for i, root in enumerate(roots):
        winners = [name for name, won in wins.items() if i in won]
        assert len(winners) == 1, f"round {i}: {winners or 'nobody'} took the lock"
        assert json.loads((Path(root) / ".lock").read_text())["run_id"] == f"{winners[0]}-{i}"


def test_run_killed_after_commit_but_before_publishing_is_read_from_staging(tmp_path):
    store = Store(tmp_path / "s")
    cat = pa.Table.from_pylist([{"source_path": "a.txt", "doc_id": "x", "present": True}], schema=schema.CATALOG)
    store.write_table("runs/r1/staged/catalog.parquet", cat, run_id="r1")
    # Commit point reached (manifest written) but the publish step never ran.
    store.write_json("runs/r1/manifest.json", {"run_id": "r1", "sequence": 1,
                                                "publish": {"staged/catalog.parquet": "catalog.parquet"}})
    fresh = Store(tmp_path / "s")
    assert fresh.catalog().column("source_path").to_pylist() == ["a.txt"]
    fresh.recover()
    assert (tmp_path / "s" / "catalog.parquet").exists()
    assert fresh.catalog().column("doc_id").to_pylist() == ["x"]


def test_sweep_removes_what_an_uncommitted_run_left(tmp_path):
    store = Store(tmp_path / "s")
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one"}), [("docA", "document")])
    _commit(store, "r1")
    store.write_stage_part("extract", "r2", "a", _pages("r2", "docA", {"page/1": "half"}), [("docA", "document")])
    assert sorted(store.uncommitted_run_dirs()) == ["runs/r2", "stages/extract/r2"]
    store.sweep_uncommitted()
    assert not (tmp_path / "s" / "stages" / "extract" / "r2").exists()
    assert _current_texts(store, "docA") == {"page/1": "one"}


def test_a_running_runs_ledger_shows_each_part_as_it_is_written(tmp_path):
    store = Store(tmp_path / "s")
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one"}), [("docA", "document")])
    assert store.run_docs("extract", "r1") == {"docA"}
    store.write_stage_part("extract", "r1", "b", _pages("r1", "docB", {"page/1": "two"}), [("docB", "document")])
    assert store.run_docs("extract", "r1") == {"docA", "docB"}
    assert _current_texts(store, "docB", include_run="r1") == {"page/1": "two"}


def test_a_committed_runs_ledgers_come_from_its_one_ledger_file_or_else_from_each_part(tmp_path):
    root = tmp_path / "s"
    store = Store(root)
    store.write_stage_part("extract", "r1", "a", _pages("r1", "docA", {"page/1": "one", "page/2": "two"}),
                           [("docA", "document")])
    store.write_stage_part("extract", "r1", "b", _pages("r1", "docB", {"page/1": "uno"}), [("docB", "document")])
    _commit(store, "r1")
    store.write_stage_part("extract", "r2", "a", _pages("r2", "docA", {"page/2": "deux"}, {"page/2": 1}),
                           [("docA", "units")])
    _commit(store, "r2")
    manifest = json.loads((root / "runs" / "r2" / "manifest.json").read_text())
    assert "runs/r2/ledger.parquet" in manifest["files"]  # checked by `thresher verify` like any run file

    def seen() -> tuple:
        s = Store(root)
        ledgers = {r: (s._ledger("extract", r).files, sorted(s._ledger("extract", r).full)) for r in ("r1", "r2")}
        return ledgers, _current_texts(s, "docA"), _current_texts(s, "docB")

    forget_cached_ledgers()  # as a new process finds them
    from_parts = seen()
    assert from_parts[1] == {"page/1": "one", "page/2": "deux"} and from_parts[2] == {"page/1": "uno"}
    # Without the per-part ledger files, a new process still reads the same view: from
    # the one file per run.
    parts_dir = tmp_path / "writes-aside"
    for r in ("r1", "r2"):
        (root / "runs" / r / "writes").rename(parts_dir.with_name(f"writes-{r}"))
    forget_cached_ledgers()  # as a new process finds them
    assert seen() == from_parts
    # A store written before the one file existed: read part by part, as before.
    for r in ("r1", "r2"):
        parts_dir.with_name(f"writes-{r}").rename(root / "runs" / r / "writes")
        (root / "runs" / r / "ledger.parquet").unlink()
    forget_cached_ledgers()  # as a new process finds them
    assert seen() == from_parts
