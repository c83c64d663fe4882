"""The PostgreSQL delivery target (psycopg 3): a table in a schema the definition
names, every hand-off column typed (lists of strings as text[], maps as jsonb), a
tsvector column over the chunk text in the text-search configuration of the chunk's
language where the server has one (else `simple`), a GIN index on it, and a table of
the runs applied.

Each delivery is one transaction holding a transaction-level advisory lock, so two
deliveries to one table never interleave; rows go in by COPY into a temporary table and
one INSERT ... ON CONFLICT from it, the usual fast path for bulk upserts.
"""

from __future__ import annotations

import os
from datetime import datetime, timezone
from typing import Any

import pyarrow as pa

from thresher.flows.config import TargetEntry
from thresher.flows.faults import fault
from thresher.flows.deliver import Delivery, DeliveryError, row_values

RUNS_TABLE = "thresher_runs"

# ISO 639-1 code -> the text-search configuration PostgreSQL ships under that language's
# English name (the snowball stemmers in a stock install; PostgreSQL manual, chapter
# "Full Text Search", "Configuration Example"). Only those the server has are used.
LANGUAGE_CONFIGS = {
    "ar": "arabic", "hy": "armenian", "eu": "basque", "ca": "catalan", "da": "danish", "nl": "dutch",
    "en": "english", "fi": "finnish", "fr": "french", "de": "german", "el": "greek", "hi": "hindi",
    "hu": "hungarian", "id": "indonesian", "ga": "irish", "it": "italian", "lt": "lithuanian",
    "ne": "nepali", "no": "norwegian", "pt": "portuguese", "ro": "romanian", "ru": "russian",
    "sr": "serbian", "es": "spanish", "sv": "swedish", "ta": "tamil", "tr": "turkish", "yi": "yiddish",
}


def sql_type(t: pa.DataType) -> str:
    if pa.types.is_boolean(t):
        return "boolean"
    if pa.types.is_integer(t):
        return "bigint" if t.bit_width > 32 else "integer"
    if pa.types.is_floating(t):
        return "double precision"
    if pa.types.is_timestamp(t):
        return "timestamptz"
    if (pa.types.is_list(t) or pa.types.is_large_list(t)) and pa.types.is_string(t.value_type):
        return "text[]"
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return "text"
    return "jsonb"


class PostgresTarget:
    def __init__(self, entry: TargetEntry, store=None):
        try:
            import psycopg
        except ImportError:
            raise DeliveryError(f"target {entry.name}: psycopg is not installed "
                                "(pip install 'thresher[postgres]')") from None
        self.psycopg = psycopg
        self.entry = entry
        dsn = entry.dsn
        if entry.dsn_env:
            dsn = os.environ.get(entry.dsn_env)
            if not dsn:
                raise DeliveryError(f"target {entry.name}: the environment variable {entry.dsn_env} "
                                    "(dsn_env) is not set")
        try:
            self.db = psycopg.connect(dsn, autocommit=False, connect_timeout=15)
        except psycopg.Error as exc:
            raise DeliveryError(f"target {entry.name}: cannot connect: {str(exc).strip()}") from None
        self.schema = entry.db_schema
        self.table = f'"{self.schema}"."{entry.table}"'
        self.runs_table = f'"{self.schema}"."{RUNS_TABLE}"'

    # -- the interface ------------------------------------------------------------

    def applied_runs(self) -> list[str]:
        with self.db.cursor() as cur:
            cur.execute("SELECT to_regclass(%s)", (f'"{self.schema}".{RUNS_TABLE}',))
            if cur.fetchone()[0] is None:
                self.db.rollback()
                return []
            cur.execute(f"SELECT run_id FROM {self.runs_table} ORDER BY sequence, applied_at")
            out = [r[0] for r in cur.fetchall()]
        self.db.rollback()
        return out

    def apply(self, delivery: Delivery) -> None:
        db = self.db
        try:
            with db.cursor() as cur:
                cur.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", (self.table,))
                self._ensure(cur, delivery.columns)
                configs = self._configs(cur)
                if delivery.full is not None:
                    cur.execute(f"TRUNCATE {self.table}")
                    cur.execute(f"TRUNCATE {self.runs_table}")
                    self._upsert(cur, delivery.full, configs)
                for run in delivery.runs:
                    if run.deletes:
                        cur.execute(f"DELETE FROM {self.table} WHERE chunk_id = ANY(%s)", (run.deletes,))
                    fault("deliver-after-deletes")
                    self._upsert(cur, run.upserts, configs)
                now = datetime.now(timezone.utc)
                mode = "full load" if delivery.full is not None else "changes"
                cur.executemany(
                    f"INSERT INTO {self.runs_table} (run_id, sequence, applied_at, mode) VALUES (%s, %s, %s, %s) "
                    "ON CONFLICT (run_id) DO UPDATE SET applied_at = excluded.applied_at, mode = excluded.mode",
                    [(r, s, now, mode) for r, s in delivery.record])
            db.commit()
        except BaseException:
            db.rollback()
            raise

    def row_count(self) -> int:
        with self.db.cursor() as cur:
            cur.execute("SELECT to_regclass(%s)", (f'"{self.schema}".{self.entry.table}',))
            if cur.fetchone()[0] is None:
                self.db.rollback()
                return 0
            cur.execute(f"SELECT count(*) FROM {self.table}")
            n = cur.fetchone()[0]
        self.db.rollback()
        return n

    def close(self) -> None:
        self.db.close()

    # -- helpers -------------------------------------------------------------------

    def _ensure(self, cur, columns: pa.Schema) -> None:
        cur.execute(f'CREATE SCHEMA IF NOT EXISTS "{self.schema}"')
        cols = ", ".join(f'"{f.name}" {sql_type(f.type)}' + (" PRIMARY KEY" if f.name == "chunk_id" else "")
                         for f in columns)
        cur.execute(f"CREATE TABLE IF NOT EXISTS {self.table} ({cols}, text_search tsvector)")
        cur.execute("SELECT column_name FROM information_schema.columns WHERE table_schema = %s AND table_name = %s",
                    (self.schema, self.entry.table))
        have = {r[0] for r in cur.fetchall()}
        for f in columns:
            if f.name not in have:
                cur.execute(f'ALTER TABLE {self.table} ADD COLUMN "{f.name}" {sql_type(f.type)}')
        t = self.entry.table
        cur.execute(f'CREATE INDEX IF NOT EXISTS "{t}_doc" ON {self.table} (doc_id)')
        cur.execute(f'CREATE INDEX IF NOT EXISTS "{t}_text_search" ON {self.table} USING gin (text_search)')
        cur.execute(f"CREATE TABLE IF NOT EXISTS {self.runs_table} (run_id text PRIMARY KEY, sequence integer, "
                    "applied_at timestamptz, mode text)")

    def _configs(self, cur) -> dict[str, str]:
        cur.execute("SELECT cfgname FROM pg_ts_config")
        have = {r[0] for r in cur.fetchall()}
        return {code: name for code, name in LANGUAGE_CONFIGS.items() if name in have}

    def _upsert(self, cur, table: pa.Table, configs: dict[str, str]) -> None:
        if table.num_rows == 0:
            return
        from psycopg.types.json import Jsonb

        names = table.schema.names
        kinds = {f.name: sql_type(f.type) for f in table.schema}
        cols = ", ".join(f'"{n}" {kinds[n]}' for n in names)
        cur.execute(f"CREATE TEMP TABLE IF NOT EXISTS thresher_incoming ({cols}, ts_config text) ON COMMIT DROP")
        cur.execute("TRUNCATE thresher_incoming")
        quoted = ", ".join(f'"{n}"' for n in names)

        def value(name: str, v: Any) -> Any:
            return Jsonb(v) if kinds[name] == "jsonb" and v is not None else v

        with cur.copy(f"COPY thresher_incoming ({quoted}, ts_config) FROM STDIN") as copy:
            for row in row_values(table):
                copy.write_row([value(n, row[n]) for n in names]
                               + [configs.get((row.get("language") or "")[:2], "simple")])
        updates = ", ".join(f'"{n}" = excluded."{n}"' for n in names if n != "chunk_id")
        cur.execute(f"INSERT INTO {self.table} ({quoted}, text_search) "
                    f"SELECT {quoted}, to_tsvector(ts_config::regconfig, coalesce(text, '')) FROM thresher_incoming "
                    f"ON CONFLICT (chunk_id) DO UPDATE SET {updates}, text_search = excluded.text_search")
