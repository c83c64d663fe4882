"""Delivery of change sets into real databases: SQLite (the embedded default) and a real
PostgreSQL server started by the tests (Debian's postgresql package, installed by
`make test`'s system-deps; initdb and pg_ctl into a temporary folder, on 127.0.0.1).

Each scenario runs three weekly runs over a copy of the demo drive — an edit, a rename,
a deletion — delivers after each, and checks the target's table equals the hand-off.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import REPO
from pgserver import pg_bin, scratch_server
from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.deliver import deliver, target_states
from thresher.flows.store import Store

import yaml


def _definition(targets: list[dict], after_run: bool = False):
    data = yaml.safe_load(default_config_text())
    data["deliver"] = {"after_run": after_run, "targets": targets}
    return build_definition(data, "test")


def _run(definition, source: Path, store: Path) -> dict:
    return pipeline.run(definition, str(source), str(store), workers=1, quiet=True)


def _handoff(store: Path) -> dict[str, dict]:
    table = Store(store).handoff()
    rows = {}
    for r in table.to_pylist():
        r["token_counts"] = dict(r["token_counts"] or [])
        rows[r["chunk_id"]] = r
    return rows


def _edit_rename_delete(drive: Path, step: int) -> None:
    """The three weekly changes: an edited file, a renamed file, a removed file."""
    if step == 1:
        minutes = drive / "board" / "2026-01-20-board-minutes.md"
        minutes.write_text(minutes.read_text("utf-8") + "\n\n## Late item\n\nThe treasurer reported that the "
                           "new heating contract for Tansywell was signed on 19 January.\n", "utf-8")
    elif step == 2:
        (drive / "intranet" / "opening-hours.html").rename(drive / "intranet" / "hours-2026.html")
    elif step == 3:
        (drive / "forms" / "meeting-room-booking-form.docx").unlink()


# ------------------------------------------------------------------ SQLite

def _sqlite_rows(db: Path) -> dict[str, dict]:
    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    rows = {}
    for r in con.execute("SELECT * FROM chunks"):
        d = dict(r)
        rows[d["chunk_id"]] = d
    con.close()
    return rows


def _same(handoff: dict[str, dict], target: dict[str, dict]) -> None:
    assert set(target) == set(handoff)
    for cid, h in handoff.items():
        t = target[cid]
        for col, value in h.items():
            got = t[col]
            if isinstance(value, (list, dict)) and isinstance(got, str):
                got = json.loads(got)  # SQLite holds lists and maps as JSON text
            assert got == value, (cid, col)


def _keyword_index(db: Path) -> tuple[list, list]:
    """(chunk_id, text) pairs in the full-text index and in the chunks table."""
    con = sqlite3.connect(db)
    out = (sorted(con.execute("SELECT chunk_id, text FROM chunks_fts")),
           sorted(con.execute("SELECT chunk_id, coalesce(text, '') FROM chunks")))
    con.close()
    return out


def _index_as_written_before_rowids_from_chunk_ids(db: Path) -> None:
    """The keyword index as earlier versions wrote it: rowids 1, 2, ... in insert order."""
    con = sqlite3.connect(db, isolation_level=None)
    rows = con.execute("SELECT chunk_id, text FROM chunks_fts ORDER BY chunk_id").fetchall()
    con.execute("DELETE FROM chunks_fts")
    con.executemany("INSERT INTO chunks_fts (chunk_id, text) VALUES (?, ?)", rows)
    assert con.execute("SELECT min(rowid) FROM chunks_fts").fetchone()[0] == 1
    con.close()


def test_sqlite_target_follows_three_weekly_runs_exactly(prefect_harness, sample_drive, tmp_path):
    db = tmp_path / "index.sqlite"
    definition = _definition([{"name": "local", "kind": "sqlite", "database": str(db)}], after_run=True)
    store_dir = tmp_path / "store"
    m = _run(definition, sample_drive, store_dir)
    assert m["delivered"]["targets"][0]["mode"] == "full load"
    _same(_handoff(store_dir), _sqlite_rows(db))
    # A database an earlier version filled: its keyword index is rewritten once, so the
    # deletes that follow (by rowid) leave no stale text behind.
    _index_as_written_before_rowids_from_chunk_ids(db)
    for step in (1, 2, 3):
        _edit_rename_delete(sample_drive, step)
        m = _run(definition, sample_drive, store_dir)
        t = m["delivered"]["targets"][0]
        assert t["mode"] == "changes" and t["runs"] == [m["run_id"]]
        assert (t["upserts"], t["deletes"]) == (m["changes"]["upsert"], m["changes"]["delete"])
        _same(_handoff(store_dir), _sqlite_rows(db))
        indexed, held = _keyword_index(db)
        assert indexed == held
    assert m["changes"]["delete"] > 0  # the removed form's chunks went

    # Every committed run is recorded once, in order; delivering again changes nothing.
    con = sqlite3.connect(db)
    recorded = [r[0] for r in con.execute("SELECT run_id FROM thresher_runs ORDER BY sequence")]
    con.close()
    assert recorded == [r.run_id for r in Store(store_dir).runs()]
    before = db.read_bytes()
    assert [r.mode for r in deliver(definition, Store(store_dir))] == ["up to date"]
    assert db.read_bytes() == before

    # Keyword search through the full-text index finds the chunk the edit added.
    con = sqlite3.connect(db)
    hits = con.execute("SELECT c.source_path FROM chunks_fts JOIN chunks c USING (chunk_id) "
                       "WHERE chunks_fts MATCH 'heating AND contract'").fetchall()
    con.close()
    assert hits == [("board/2026-01-20-board-minutes.md",)]


def test_a_target_behind_catches_up_in_order_and_a_new_one_loads_the_handoff(prefect_harness, sample_drive, tmp_path):
    behind = tmp_path / "behind.sqlite"
    definition = _definition([{"name": "behind", "kind": "sqlite", "database": str(behind)}])
    store_dir = tmp_path / "store"
    _run(definition, sample_drive, store_dir)
    assert deliver(definition, Store(store_dir))[0].mode == "full load"
    for step in (1, 3):
        _edit_rename_delete(sample_drive, step)
        _run(definition, sample_drive, store_dir)
    store = Store(store_dir)
    assert target_states(definition, store)[0].behind == 2
    result = deliver(definition, store)[0]
    assert result.mode == "changes" and result.runs == [r.run_id for r in store.runs()[1:]]
    _same(_handoff(store_dir), _sqlite_rows(behind))
    assert target_states(definition, store)[0].behind == 0

    fresh = tmp_path / "fresh.sqlite"
    definition2 = _definition([{"name": "fresh", "kind": "sqlite", "database": str(fresh)}])
    assert deliver(definition2, store)[0].mode == "full load"
    _same(_handoff(store_dir), _sqlite_rows(fresh))

    # A change set the target needs is gone (as retention would remove it): full load.
    _edit_rename_delete(sample_drive, 2)
    _run(definition, sample_drive, store_dir)
    latest = Store(store_dir).latest_run().run_id
    (store_dir / "handoff" / "changes" / f"{latest}.parquet").unlink()
    assert deliver(definition, Store(store_dir))[0].mode == "full load"
    _same(_handoff(store_dir), _sqlite_rows(behind))


def _deliver_in_child(store_dir: Path, definition_file: Path, fault: str | None, env_extra: dict | None = None):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO / "tests"), os.environ.get("PYTHONPATH", "")]))
    if fault:
        env["THRESHER_FAULT"] = fault
    env.update(env_extra or {})
    code = ("import sys; from thresher.flows.config import load_definition; from thresher.flows.store import Store; "
            "from thresher.flows.deliver import deliver; "
            "deliver(load_definition(sys.argv[1]), Store(sys.argv[2]))")
    return subprocess.run([sys.executable, "-c", code, str(definition_file), str(store_dir)], env=env,
                          capture_output=True, text=True, timeout=120)


def _write_definition(path: Path, targets: list[dict]) -> Path:
    data = yaml.safe_load(default_config_text())
    data["deliver"] = {"after_run": False, "targets": targets}
    path.write_text(yaml.safe_dump(data), "utf-8")
    return path


def test_a_delivery_killed_between_deletes_and_upserts_leaves_the_previous_state(prefect_harness, sample_drive,
                                                                                tmp_path):
    db = tmp_path / "index.sqlite"
    targets = [{"name": "local", "kind": "sqlite", "database": str(db)}]
    definition_file = _write_definition(tmp_path / "flow.yaml", targets)
    definition = _definition(targets)
    store_dir = tmp_path / "store"
    _run(definition, sample_drive, store_dir)
    deliver(definition, Store(store_dir))
    before = _sqlite_rows(db)
    _edit_rename_delete(sample_drive, 1)
    _edit_rename_delete(sample_drive, 3)
    m = _run(definition, sample_drive, store_dir)
    assert m["changes"]["delete"] and m["changes"]["upsert"]
    killed = _deliver_in_child(store_dir, definition_file, "deliver-after-deletes")
    assert killed.returncode == 75, killed.stderr
    assert _sqlite_rows(db) == before  # the journal undid the deletes
    assert len(sqlite3.connect(db).execute("SELECT * FROM thresher_runs").fetchall()) == 1
    done = _deliver_in_child(store_dir, definition_file, None)
    assert done.returncode == 0, done.stderr
    _same(_handoff(store_dir), _sqlite_rows(db))


# ------------------------------------------------------------------ PostgreSQL

@pytest.fixture(scope="module")
def postgres():
    """A throwaway PostgreSQL server on 127.0.0.1; its DSN."""
    if pg_bin() is None:
        pytest.fail("PostgreSQL is not installed: `make test` installs Debian's postgresql package")
    with scratch_server() as dsn:
        yield dsn


def _pg_rows(dsn: str, schema: str) -> dict[str, dict]:
    import psycopg
    from psycopg.rows import dict_row

    with psycopg.connect(dsn, row_factory=dict_row) as con:
        rows = {r["chunk_id"]: r for r in con.execute(f'SELECT * FROM "{schema}".chunks')}
    for r in rows.values():
        r.pop("text_search")
    return rows


def test_postgres_target_follows_three_weekly_runs_exactly(prefect_harness, postgres, sample_drive, tmp_path,
                                                          monkeypatch):
    monkeypatch.setenv("THRESHER_TEST_PG", postgres)
    targets = [{"name": "team", "kind": "postgres", "dsn_env": "THRESHER_TEST_PG", "schema": "weekly"}]
    definition = _definition(targets, after_run=True)
    store_dir = tmp_path / "store"
    m = _run(definition, sample_drive, store_dir)
    assert m["delivered"]["error"] is None and m["delivered"]["targets"][0]["mode"] == "full load"
    _same(_handoff(store_dir), _pg_rows(postgres, "weekly"))
    for step in (1, 2, 3):
        _edit_rename_delete(sample_drive, step)
        m = _run(definition, sample_drive, store_dir)
        assert m["delivered"]["targets"][0]["mode"] == "changes"
        _same(_handoff(store_dir), _pg_rows(postgres, "weekly"))
    assert [r.mode for r in deliver(definition, Store(store_dir))] == ["up to date"]

    import psycopg

    with psycopg.connect(postgres) as con:
        types = dict(con.execute("SELECT column_name, data_type FROM information_schema.columns "
                                 "WHERE table_schema = 'weekly' AND table_name = 'chunks'").fetchall())
        assert types["heading_path"] == "ARRAY" and types["token_counts"] == "jsonb"
        # The text-search column uses the chunk's language where PostgreSQL has it
        # (PostgreSQL ships snowball configurations for German and French).
        for lang, cfg in (("de", "german"), ("fr", "french"), ("en", "english")):
            same = con.execute("SELECT bool_and(text_search = to_tsvector(%s::regconfig, text)), count(*) "
                               "FROM weekly.chunks WHERE language = %s", (cfg, lang)).fetchone()
            assert same[1] > 0 and same[0] is True, lang
        hit = con.execute("SELECT source_path FROM weekly.chunks WHERE text_search @@ "
                          "plainto_tsquery('german', 'Zweigstellen geschlossen')").fetchall()
        assert ("notices/brackenmoor-closure.de.html",) in hit
        runs = [r[0] for r in con.execute("SELECT run_id FROM weekly.thresher_runs ORDER BY sequence")]
    assert runs == [r.run_id for r in Store(store_dir).runs()]


def test_postgres_delivery_killed_midway_leaves_the_previous_state_and_a_new_schema_catches_up(
        prefect_harness, postgres, sample_drive, tmp_path):
    targets = [{"name": "team", "kind": "postgres", "dsn": postgres, "schema": "killed"}]
    definition_file = _write_definition(tmp_path / "flow.yaml", targets)
    definition = _definition(targets)
    store_dir = tmp_path / "store"
    _run(definition, sample_drive, store_dir)
    deliver(definition, Store(store_dir))
    before = _pg_rows(postgres, "killed")
    _edit_rename_delete(sample_drive, 1)
    _edit_rename_delete(sample_drive, 3)
    _run(definition, sample_drive, store_dir)
    killed = _deliver_in_child(store_dir, definition_file, "deliver-after-deletes")
    assert killed.returncode == 75, killed.stderr
    time.sleep(0.5)  # the server notices the closed connection and rolls back
    assert _pg_rows(postgres, "killed") == before
    assert _deliver_in_child(store_dir, definition_file, None).returncode == 0
    _same(_handoff(store_dir), _pg_rows(postgres, "killed"))

    fresh = _definition([{"name": "fresh", "kind": "postgres", "dsn": postgres, "schema": "fresh"}])
    assert deliver(fresh, Store(store_dir))[0].mode == "full load"
    _same(_handoff(store_dir), _pg_rows(postgres, "fresh"))


def test_your_own_target_by_dotted_path(prefect_harness, sample_drive, tmp_path, monkeypatch):
    monkeypatch.syspath_prepend(str(REPO / "tests"))
    out = tmp_path / "chunks.json"
    definition = _definition([{"name": "mine", "kind": "example_target:JsonFileTarget",
                               "options": {"path": str(out)}}], after_run=True)
    store_dir = tmp_path / "store"
    _run(definition, sample_drive, store_dir)
    _edit_rename_delete(sample_drive, 3)
    m = _run(definition, sample_drive, store_dir)
    assert m["delivered"]["targets"][0]["mode"] == "changes"
    state = json.loads(out.read_text("utf-8"))
    assert set(state["chunks"]) == set(_handoff(store_dir))
    assert state["runs"] == [r.run_id for r in Store(store_dir).runs()]


def test_target_settings_are_checked_with_the_key_named():
    from thresher.flows.config import ConfigError

    with pytest.raises(ConfigError, match=r"deliver\.targets\[0\].*database"):
        _definition([{"name": "a", "kind": "sqlite"}])
    with pytest.raises(ConfigError, match=r"deliver\.targets\[0\]\.kind.*package\.module:factory"):
        _definition([{"name": "a", "kind": "oracle"}])
    with pytest.raises(ConfigError, match=r"deliver\.targets.*unique"):
        _definition([{"name": "a", "kind": "sqlite", "database": "x"}, {"name": "a", "kind": "sqlite", "database": "y"}])


def test_sqlite_values_made_a_column_at_a_time_are_those_of_a_row_at_a_time():
    # The SQLite target turns a table's cells into parameters a column at a time
    # (sqlite.table_rows); each must be what _value gives the cell as a row holds it:
    # JSON for lists, maps and structs, ISO 8601 for timestamps, 0/1 for booleans.
    from datetime import datetime, timezone

    import pyarrow as pa

    from thresher.flows.deliver import row_values
    from thresher.flows.targets.sqlite import _value, table_rows

    when = datetime(2026, 3, 1, 9, 30, tzinfo=timezone.utc)
    table = pa.table({
        "chunk_id": pa.array(["b", "a", None], pa.string()),
        "token_count": pa.array([3, None, 7], pa.int64()),
        "language_prob": pa.array([0.5, 0.99, None], pa.float64()),
        "heading_path": pa.array([["Rota", "Tuesday"], [], None], pa.list_(pa.string())),
        "token_counts": pa.array([[("cl100k_base", 3)], None, []], pa.map_(pa.string(), pa.int64())),
        "span": pa.array([{"start": 1, "end": 2}, None, {"start": 0, "end": 0}],
                         pa.struct([("start", pa.int64()), ("end", pa.int64())])),
        "started_at": pa.array([when, None, when], pa.timestamp("us", tz="UTC")),
        "personal": pa.array([True, False, None], pa.bool_()),
    })
    by_row = [tuple(_value(r[n]) for n in table.schema.names) for r in row_values(table)]

    assert table_rows(table) == by_row
    assert by_row[0][4] == '{"cl100k_base": 3}' and by_row[0][6] == "2026-03-01T09:30:00+00:00"
    assert by_row[0][7] == 1 and by_row[1][7] == 0
