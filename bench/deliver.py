"""Delivery and probes on the 1,000-document bench drive.

Delivery: a full load and a 1 % change set into SQLite and into PostgreSQL (a scratch
server, when Debian's postgresql is installed), each beside a plain bulk insert of the
same rows into a bare table measured in the same run (ratio: thresher's delivery time
over the bare insert's). The bare inserts are the floor: one executemany into a table
without indexes (SQLite), one COPY into a table without indexes (PostgreSQL).

Probes: 100 questions made from the drive's own chunks (six words of a chunk, expecting
its document), answered by BM25 over every live chunk.
"""

from __future__ import annotations

import json
import random
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

import yaml

from bench.drive import REPO, change_files, make_drive

DOCUMENTS = 1000


def _definition(targets: list[dict]):
    from thresher.flows.config import build_definition, default_config_text

    data = yaml.safe_load(default_config_text())
    data["deliver"] = {"after_run": False, "targets": targets}
    return build_definition(data, "bench")


def _bare_sqlite(rows: list[dict], path: Path) -> float:
    names = list(rows[0])
    con = sqlite3.connect(path, isolation_level=None)
    con.execute(f"CREATE TABLE bare ({', '.join(names)})")
    values = [tuple(json.dumps(v, default=str) if isinstance(v, (list, dict)) else v for v in r.values())
              for r in rows]
    t = time.perf_counter()
    con.execute("BEGIN")
    con.executemany(f"INSERT INTO bare VALUES ({', '.join('?' for _ in names)})", values)
    con.execute("COMMIT")
    elapsed = time.perf_counter() - t
    con.close()
    return elapsed


def _bare_postgres(rows: list[dict], dsn: str, table: str) -> float:
    import psycopg
    from psycopg.types.json import Jsonb

    names = list(rows[0])
    kinds = {n: ("text[]" if isinstance(rows[0][n], list) else "jsonb" if isinstance(rows[0][n], dict)
                 else "bigint" if isinstance(rows[0][n], int) else "text") for n in names}
    with psycopg.connect(dsn) as con:
        con.execute(f"CREATE TABLE {table} ({', '.join(f'{n} {k}' for n, k in kinds.items())})")
        con.commit()
        t = time.perf_counter()
        with con.cursor().copy(f"COPY {table} ({', '.join(names)}) FROM STDIN") as copy:
            for r in rows:
                copy.write_row([Jsonb(v) if kinds[n] == "jsonb" and v is not None else v for n, v in r.items()])
        con.commit()
        return time.perf_counter() - t


def _rows(table) -> list[dict]:
    from thresher.flows.deliver import row_values

    return list(row_values(table))


def main() -> None:
    from thresher.flows import runtime  # noqa: F401

    from bench.warm import start_prefect

    from thresher.flows import pipeline
    from thresher.flows.deliver import deliver
    from thresher.flows.probes import Probe, answer_probes
    from thresher.flows.store import Store

    start_prefect()
    sys.path.insert(0, str(REPO / "tests"))
    try:
        from pgserver import pg_bin, scratch_server
    except ImportError:
        pg_bin = None  # type: ignore[assignment]
    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        drive = make_drive(tmp_path / "drive", DOCUMENTS)
        store_dir = tmp_path / "store"
        plain = _definition([])
        pipeline.run(plain, str(drive), str(store_dir), quiet=True)
        store = Store(store_dir)
        handoff = store.handoff()
        full_rows = _rows(handoff)
        print(f"drive: {DOCUMENTS} documents, {handoff.num_rows} live chunks")

        results = []
        sqlite_def = _definition([{"name": "bench", "kind": "sqlite", "database": str(tmp_path / "index.sqlite")}])
        t = time.perf_counter()
        deliver(sqlite_def, store)
        full_s = time.perf_counter() - t
        bare_full = _bare_sqlite(full_rows, tmp_path / "bare-full.sqlite")
        results.append(("sqlite", "full load", handoff.num_rows, full_s, bare_full))

        pg = None
        if pg_bin is not None and pg_bin() is not None:
            pg = scratch_server()
            dsn = pg.__enter__()
            pg_def = _definition([{"name": "bench", "kind": "postgres", "dsn": dsn, "schema": "bench"}])
            t = time.perf_counter()
            deliver(pg_def, store)
            pg_full = time.perf_counter() - t
            results.append(("postgres", "full load", handoff.num_rows, pg_full, _bare_postgres(full_rows, dsn, "bare_full")))

        change_files(drive, 0.01)
        m = pipeline.run(plain, str(drive), str(store_dir), quiet=True)
        store = Store(store_dir)
        changed = m["changes"]["upsert"] + m["changes"]["delete"]
        ups = set(store.read_table(f"handoff/changes/{m['run_id']}.parquet").column("chunk_id").to_pylist())
        handoff = store.handoff()
        change_rows = [r for r in _rows(handoff) if r["chunk_id"] in ups]
        t = time.perf_counter()
        deliver(sqlite_def, store)
        results.append(("sqlite", "1% change set", changed, time.perf_counter() - t,
                        _bare_sqlite(change_rows, tmp_path / "bare-change.sqlite") if change_rows else 0.0))
        if pg is not None:
            t = time.perf_counter()
            deliver(pg_def, store)
            results.append(("postgres", "1% change set", changed, time.perf_counter() - t,
                            _bare_postgres(change_rows, dsn, "bare_change") if change_rows else 0.0))
            pg.__exit__(None, None, None)
        else:
            print("postgres: not installed (make test installs it); skipped")

        print(f"{'target':<9} {'delivery':<14} {'rows':>7} {'seconds':>8} {'rows/s':>9} {'bare insert s':>14} {'ratio':>6}")
        for target, what, n, secs, bare in results:
            ratio = f"{secs / bare:6.1f}" if bare else "     -"
            print(f"{target:<9} {what:<14} {n:>7} {secs:8.2f} {n / secs:9.0f} {bare:14.3f} {ratio}")

        rng = random.Random(5)
        table = handoff.select(["chunk_id", "source_path", "text", "heading_path", "page_start", "page_end"])
        picked = rng.sample(range(table.num_rows), 100)
        probes = []
        for i in picked:
            words = [w for w in (table.column("text")[i].as_py() or "").split() if len(w) > 3]
            start = rng.randrange(max(1, len(words) - 6))
            probes.append(Probe(ask=" ".join(words[start:start + 6]) or "empty",
                                expect=table.column("source_path")[i].as_py()))
        t = time.perf_counter()
        _, summary = answer_probes(probes, table, "bench")
        secs = time.perf_counter() - t
        print(f"probes: 100 questions over {table.num_rows} chunks in {secs:.2f} s "
              f"({secs * 10:.0f} ms a question, index build included); "
              f"hit@1 {summary.hit_at_1:.2f}, hit@5 {summary.hit_at_5:.2f} (the generated notes repeat one small "
              "vocabulary, so these rates say nothing of quality; bench retrieval measures that)")
