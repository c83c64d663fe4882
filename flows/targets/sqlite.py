"""The SQLite delivery target: one database file, a chunks table with every hand-off
column, an FTS5 full-text index over chunk text, and a table of the runs applied.

Lists and maps are stored as JSON text (SQLite has no array type); timestamps as ISO
8601 text. Each delivery is one `BEGIN IMMEDIATE ... COMMIT`: SQLite's journal undoes
a delivery that dies half-way, and a second writer waits instead of interleaving.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pyarrow as pa

from thresher.flows.config import TargetEntry
from thresher.flows.faults import fault
from thresher.flows.deliver import Delivery, DeliveryError
from thresher.flows.store import Store

RUNS_TABLE = "thresher_runs"


def text_rowid(chunk_id: str) -> int:
    """The keyword index's rowid for a chunk: 63 bits of BLAKE2b over its chunk_id.

    FTS5 finds a row quickly only by rowid (its chunk_id column is UNINDEXED, so a
    DELETE ... WHERE chunk_id = ? reads the whole index: 10.8 s for the deletes of a
    1 % change set on a 41,000-chunk drive, cProfile). A rowid that follows from the
    chunk_id lets a delivery delete by rowid with no lookup table. Two chunk ids share
    one with odds of about n^2 / 2^64; the index then refuses the second row and the
    delivery fails whole (rolled back), never quietly."""
    return int.from_bytes(hashlib.blake2b(chunk_id.encode(), digest_size=8).digest(), "big") >> 1


def database_path(entry: TargetEntry, store: Store) -> str:
    """The database file; `{store}` in the definition stands for a local store's folder."""
    path = entry.database or ""
    if "{store}" in path:
        if "://" in store.root:
            raise DeliveryError(f"target {entry.name}: {{store}} in database needs a local store, "
                                f"not {store.root}; give the database a path of its own")
        path = path.replace("{store}", store.base)
    return path


def sql_type(t: pa.DataType) -> str:
    if pa.types.is_integer(t) or pa.types.is_boolean(t):
        return "INTEGER"
    if pa.types.is_floating(t):
        return "REAL"
    return "TEXT"


def _value(v: Any) -> Any:
    if isinstance(v, (list, dict)):
        return json.dumps(v, ensure_ascii=False, sort_keys=True, default=str)
    if isinstance(v, datetime):
        return v.isoformat()
    if isinstance(v, bool):
        return int(v)
    return v


def _plain(t: pa.DataType) -> bool:
    """A column whose Python values SQLite takes as they are (_value leaves them)."""
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_string(t) or pa.types.is_large_string(t)


def column_values(column: pa.ChunkedArray) -> list[Any]:
    """_value of every cell of a column, worked out a column at a time (map cells as
    dicts, as deliver.row_values gives them): a row at a time, with a type test per
    cell, it was 1.0 s of a 41,370-chunk full load (scratch timing)."""
    values = column.to_pylist()
    if _plain(column.type):
        return values
    if pa.types.is_map(column.type):
        return [None if v is None else _value(dict(v)) for v in values]
    return [_value(v) for v in values]


def table_rows(table: pa.Table) -> list[tuple]:
    """The table's rows as SQLite parameters, in column order."""
    return list(zip(*(column_values(table.column(n)) for n in table.schema.names)))


class SqliteTarget:
    def __init__(self, entry: TargetEntry, store: Store):
        self.entry = entry
        self.table = entry.table
        path = Path(database_path(entry, store))
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            # isolation_level=None: transactions are ours (BEGIN IMMEDIATE below).
            self.db = sqlite3.connect(str(path), isolation_level=None, timeout=60)
        except (OSError, sqlite3.Error) as exc:
            raise DeliveryError(f"target {entry.name}: cannot open {path}: {exc}") from None

    # -- the interface ------------------------------------------------------------

    def applied_runs(self) -> list[str]:
        if not self._exists(RUNS_TABLE):
            return []
        return [r[0] for r in self.db.execute(f"SELECT run_id FROM {RUNS_TABLE} ORDER BY sequence, applied_at")]

    def apply(self, delivery: Delivery) -> None:
        db = self.db
        db.execute("BEGIN IMMEDIATE")
        try:
            self._ensure(delivery.columns)
            if delivery.full is not None:
                db.execute(f"DELETE FROM {self.table}")
                db.execute(f"DELETE FROM {self.table}_fts")
                db.execute(f"DELETE FROM {RUNS_TABLE}")
                self._upsert(delivery.full)
            for run in delivery.runs:
                # A run's change set never names one id twice, so within a run order
                # does not matter; across runs it does (a chunk deleted, then re-created).
                self._delete(run.deletes)
                fault("deliver-after-deletes")
                self._upsert(run.upserts)
            now = datetime.now(timezone.utc).isoformat()
            mode = "full load" if delivery.full is not None else "changes"
            db.executemany(f"INSERT OR REPLACE INTO {RUNS_TABLE} (run_id, sequence, applied_at, mode) "
                           "VALUES (?, ?, ?, ?)", [(r, s, now, mode) for r, s in delivery.record])
            db.execute("COMMIT")
        except BaseException:
            db.execute("ROLLBACK")
            raise

    def row_count(self) -> int:
        if not self._exists(self.table):
            return 0
        return self.db.execute(f"SELECT count(*) FROM {self.table}").fetchone()[0]

    def close(self) -> None:
        self.db.close()

    # -- helpers -------------------------------------------------------------------

    def _exists(self, name: str) -> bool:
        return self.db.execute("SELECT 1 FROM sqlite_master WHERE name = ?", (name,)).fetchone() is not None

    def _ensure(self, columns: pa.Schema) -> None:
        """Create the tables on first use; add columns a newer hand-off brings."""
        db = self.db
        cols = ", ".join(f'"{f.name}" {sql_type(f.type)}' + (" PRIMARY KEY" if f.name == "chunk_id" else "")
                         for f in columns)
        db.execute(f"CREATE TABLE IF NOT EXISTS {self.table} ({cols})")
        have = {r[1] for r in db.execute(f"PRAGMA table_info({self.table})")}
        for f in columns:
            if f.name not in have:
                db.execute(f'ALTER TABLE {self.table} ADD COLUMN "{f.name}" {sql_type(f.type)}')
        db.execute(f"CREATE INDEX IF NOT EXISTS {self.table}_doc ON {self.table} (doc_id)")
        # unicode61 with diacritics folded: common practice for mixed-language keyword search.
        db.execute(f"CREATE VIRTUAL TABLE IF NOT EXISTS {self.table}_fts USING fts5("
                   "chunk_id UNINDEXED, text, tokenize = 'unicode61 remove_diacritics 2')")
        db.execute(f"CREATE TABLE IF NOT EXISTS {RUNS_TABLE} (run_id TEXT PRIMARY KEY, sequence INTEGER, "
                   "applied_at TEXT, mode TEXT)")
        self._rowids_from_chunk_ids()

    def _rowids_from_chunk_ids(self) -> None:
        """An index written before text_rowid (rowids 1, 2, ...) is written again once from
        the chunks table, so that deletes by rowid find every row."""
        first = self.db.execute(f"SELECT rowid, chunk_id FROM {self.table}_fts LIMIT 1").fetchone()
        if first is None or first[0] == text_rowid(first[1]):
            return
        self.db.execute(f"DELETE FROM {self.table}_fts")
        self.db.executemany(f"INSERT INTO {self.table}_fts (rowid, chunk_id, text) VALUES (?, ?, ?)",
                            ((text_rowid(c), c, t or "") for c, t in
                             self.db.execute(f"SELECT chunk_id, text FROM {self.table}")))

    def _delete(self, chunk_ids: list[str]) -> None:
        self.db.executemany(f"DELETE FROM {self.table} WHERE chunk_id = ?", [(c,) for c in chunk_ids])
        self.db.executemany(f"DELETE FROM {self.table}_fts WHERE rowid = ?", [(text_rowid(c),) for c in chunk_ids])

    def _upsert(self, table: pa.Table) -> None:
        if table.num_rows == 0:
            return
        names = table.schema.names
        quoted = ", ".join(f'"{n}"' for n in names)
        marks = ", ".join("?" for _ in names)
        updates = ", ".join(f'"{n}" = excluded."{n}"' for n in names if n != "chunk_id")
        sql = (f"INSERT INTO {self.table} ({quoted}) VALUES ({marks}) "
               f"ON CONFLICT(chunk_id) DO UPDATE SET {updates}")
        # In key order: SQLite appends to the table's B-tree instead of splitting pages
        # all over it (0.49 -> 0.35 s for a 41,370-chunk full load, scratch timing).
        table = table.sort_by("chunk_id")
        ids = table.column("chunk_id").to_pylist()
        texts = [t or "" for t in table.column("text").to_pylist()]
        held = self._texts(ids)
        for start in range(0, table.num_rows, 5000):
            self.db.executemany(sql, table_rows(table.slice(start, 5000)))
        # The keyword index is rewritten only where the text changed: a change of access
        # alone (readers, label) leaves it as it is. In rowid order: FTS5 flushes its
        # pending terms when a rowid is not above the last one written (fts5_index.c,
        # from memory of SQLite's source); 41,370 chunks' text took 3.7-3.8 s to index
        # in hashed order, 2.1-2.4 s in rowid order (scratch timing).
        stale = sorted((text_rowid(c), c, t) for c, t in zip(ids, texts) if held.get(c) != t)
        self.db.executemany(f"DELETE FROM {self.table}_fts WHERE rowid = ?",
                            [(r,) for r, c, _ in stale if c in held])
        self.db.executemany(f"INSERT INTO {self.table}_fts (rowid, chunk_id, text) VALUES (?, ?, ?)", stale)

    def _texts(self, chunk_ids: list[str]) -> dict[str, str]:
        """The text the target holds now for these chunk ids (absent ids left out)."""
        out: dict[str, str] = {}
        for start in range(0, len(chunk_ids), 500):  # under SQLite's bound-parameter limit
            part = chunk_ids[start:start + 500]
            marks = ", ".join("?" for _ in part)
            out.update((c, t or "") for c, t in self.db.execute(
                f"SELECT chunk_id, text FROM {self.table} WHERE chunk_id IN ({marks})", part))
        return out
