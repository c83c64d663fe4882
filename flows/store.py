"""The stage store: Parquet datasets per stage, run manifests, the catalog, the hand-off.

Layout under the store root:
  stages/<stage>/<run_id>/part-<n>.parquet   rows a run wrote, one file per batch
  runs/<run_id>/writes/<stage>/part-<n>.parquet  which documents each part covered, and how
  runs/<run_id>/manifest.json                written last: the run is committed
  runs/<run_id>/staged/...                   catalog and hand-off, published after commit
  catalog.parquet, handoff/chunks.parquet, handoff/changes/<run_id>.parquet
  .lock                                      held by the one run writing to the store

Readers only see runs whose manifest exists. Every file is written under a
temporary name and renamed into place, so a killed run leaves no partial file that
a reader could take for output.
"""

from __future__ import annotations

import json
import os
from contextlib import contextmanager
import secrets
import socket
import threading
import time
import uuid
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute  # noqa: F401 - registers pa.compute
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from thresher.flows import schema

RUN_META_KEY = b"thresher.run_id"

# A committed run's files never change, so what they hold is cached for the process,
# shared by every Store object on the same root (tasks make their own): per
# (store base, stage, run id), which documents each part file holds and how.
_LEDGERS: dict[tuple[str, str, str], "Ledger"] = {}
_LEDGER_FILES: dict[str, list[tuple[str, str]]] = {}
_LEDGERS_LOCK = threading.Lock()
COMPRESSION = "zstd"


class StoreError(RuntimeError):
    """The store cannot be used as asked; the message says why."""


class StoreLocked(StoreError):
    pass


def new_run_id(now: datetime | None = None) -> str:
    now = now or datetime.now(timezone.utc)
    return f"{now:%Y%m%dT%H%M%S}Z-{secrets.token_hex(3)}"


def _filesystem(root: str) -> tuple[pafs.FileSystem, str]:
    if "://" in root:
        fs, path = pafs.FileSystem.from_uri(root)
        return fs, path.rstrip("/")
    return pafs.LocalFileSystem(), str(Path(root).resolve())


@dataclass
class Ledger:
    files: dict[str, list[str]]  # doc_id -> part files holding its rows
    full: list[str]  # doc_ids the run rewrote whole at the stage


@dataclass
class RunInfo:
    run_id: str
    sequence: int
    manifest: dict[str, Any]


class Store:
    def __init__(self, root: str | os.PathLike[str]):
        self.root = str(root)
        self.fs, self.base = _filesystem(self.root)
        self._runs_cache: list[RunInfo] | None = None

    # ----------------------------------------------------------------- paths and files

    def path(self, rel: str) -> str:
        return f"{self.base}/{rel}" if rel else self.base

    def exists(self, rel: str) -> bool:
        return self.fs.get_file_info(self.path(rel)).type != pafs.FileType.NotFound

    def _list(self, rel: str, recursive: bool = False) -> list[pafs.FileInfo]:
        sel = pafs.FileSelector(self.path(rel), allow_not_found=True, recursive=recursive)
        return self.fs.get_file_info(sel)

    def _atomic_write(self, rel: str, write) -> None:
        """Write a file so that readers see all of it or none of it.

        Local and shared file systems: a temporary name in the same folder, then a
        rename (atomic on POSIX). Object stores: straight to the final key, since an
        object appears only when its upload completes (a rename there is a copy).
        """
        final = self.path(rel)
        parent = final.rsplit("/", 1)[0]
        if not self._is_local():
            with self.fs.open_output_stream(final) as out:
                write(out)
            return
        self.fs.create_dir(parent, recursive=True)
        tmp = f"{parent}/.tmp-{uuid.uuid4().hex}-{final.rsplit('/', 1)[1]}"
        try:
            with self.fs.open_output_stream(tmp) as out:
                write(out)
            self.fs.move(tmp, final)
        except BaseException:
            try:
                self.fs.delete_file(tmp)
            except OSError:
                pass
            raise

    @contextmanager
    def parquet_writer(self, rel: str, sch: pa.Schema, run_id: str | None = None):
        """A Parquet writer for a file written in pieces, with the same atomicity as _atomic_write."""
        if run_id is not None:
            meta = dict(sch.metadata or {})
            meta[RUN_META_KEY] = run_id.encode()
            sch = sch.with_metadata(meta)
        final = self.path(rel)
        parent = final.rsplit("/", 1)[0]
        if self._is_local():
            self.fs.create_dir(parent, recursive=True)
            target = f"{parent}/.tmp-{uuid.uuid4().hex}-{final.rsplit('/', 1)[1]}"
        else:
            target = final
        try:
            with self.fs.open_output_stream(target) as out, pq.ParquetWriter(out, sch, compression=COMPRESSION) as w:
                yield w
            if target != final:
                self.fs.move(target, final)
        except BaseException:
            if target != final:
                try:
                    self.fs.delete_file(target)
                except OSError:
                    pass
            raise

    def write_table(self, rel: str, table: pa.Table, run_id: str | None = None) -> None:
        if run_id is not None:
            meta = dict(table.schema.metadata or {})
            meta[RUN_META_KEY] = run_id.encode()
            table = table.replace_schema_metadata(meta)
        self._atomic_write(
            rel, lambda out: pq.write_table(table, out, compression=COMPRESSION, row_group_size=2048)
        )

    def write_json(self, rel: str, obj: Any) -> None:
        data = json.dumps(obj, indent=2, sort_keys=True, default=str).encode()
        self._atomic_write(rel, lambda out: out.write(data))

    def read_json(self, rel: str) -> Any:
        with self.fs.open_input_stream(self.path(rel)) as f:
            return json.loads(f.read())

    def read_table(self, rel: str, columns: list[str] | None = None) -> pa.Table:
        with self.fs.open_input_file(self.path(rel)) as f:
            return pq.read_table(f, columns=columns)

    def move(self, src_rel: str, dst_rel: str) -> None:
        self.fs.create_dir(self.path(dst_rel).rsplit("/", 1)[0], recursive=True)
        self.fs.move(self.path(src_rel), self.path(dst_rel))

    def delete_dir(self, rel: str) -> None:
        if self.exists(rel):
            self.fs.delete_dir(self.path(rel))

    # ----------------------------------------------------------------- the lock

    LOCK = ".lock"
    # An object-store lock is advisory and expires, since a killed run cannot remove it
    # and there is no exclusive create to rely on.
    OBJECT_LOCK_HOURS = 12

    def _is_local(self) -> bool:
        return isinstance(self.fs, pafs.LocalFileSystem)

    def _lock_info(self, run_id: str) -> dict:
        now = datetime.now(timezone.utc)
        return {"run_id": run_id, "pid": os.getpid(), "host": socket.gethostname(),
                "since": now.isoformat(timespec="seconds"),
                "expires": (now.timestamp() + self.OBJECT_LOCK_HOURS * 3600)}

    def lock_holder(self) -> dict | None:
        try:
            with self.fs.open_input_stream(self.path(self.LOCK)) as f:
                return json.loads(f.read())
        except (OSError, ValueError):
            return None

    @staticmethod
    def _holder_alive(holder: dict) -> bool:
        if holder.get("host") != socket.gethostname():
            expires = holder.get("expires")
            return expires is None or float(expires) > time.time()
        try:
            os.kill(int(holder.get("pid", -1)), 0)
        except ProcessLookupError:
            return False
        except (PermissionError, ValueError):
            return True
        return True

    def _refuse(self, holder: dict | None) -> StoreLocked:
        who = (f"run {holder.get('run_id')} (pid {holder.get('pid')} on {holder.get('host')}, "
               f"since {holder.get('since')})") if holder else "another run"
        return StoreLocked(f"store {self.root} is in use by {who}; wait for it to finish")

    def acquire_lock(self, run_id: str, wait_seconds: float = 0.0) -> None:
        """Take the store's write lock, or raise StoreLocked saying who holds it.

        On a local or shared file system the lock file is created exclusively
        (O_EXCL). On object storage the lock is advisory: thresher writes it, reads
        it back after a pause and gives way if another run's lock replaced it.
        """
        deadline = time.monotonic() + wait_seconds
        while True:
            holder = self.lock_holder()
            if holder is not None and not self._holder_alive(holder):
                self._remove_lock()  # left by a killed run
                holder = None
            if holder is None and self._create_lock(run_id):
                return
            if time.monotonic() < deadline:
                time.sleep(0.5)
                continue
            raise self._refuse(self.lock_holder()) from None

    def _create_lock(self, run_id: str) -> bool:
        data = json.dumps(self._lock_info(run_id))
        if self._is_local():
            Path(self.base).mkdir(parents=True, exist_ok=True)
            try:
                fd = os.open(Path(self.base) / self.LOCK, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                return False
            with os.fdopen(fd, "w") as f:
                f.write(data)
            return True
        with self.fs.open_output_stream(self.path(self.LOCK)) as out:
            out.write(data.encode())
        time.sleep(1.0)  # let a concurrent writer's lock land, then see whose survived
        holder = self.lock_holder()
        return bool(holder) and holder.get("run_id") == run_id

    def _remove_lock(self) -> None:
        try:
            self.fs.delete_file(self.path(self.LOCK))
        except OSError:
            pass

    def holds_lock(self, run_id: str) -> bool:
        holder = self.lock_holder()
        return bool(holder) and holder.get("run_id") == run_id and holder.get("pid") == os.getpid()

    def release_lock(self, run_id: str) -> None:
        holder = self.lock_holder()
        if holder and holder.get("run_id") == run_id:
            self._remove_lock()

    # ----------------------------------------------------------------- runs

    def runs(self, refresh: bool = False) -> list[RunInfo]:
        """Committed runs, oldest first."""
        if self._runs_cache is None or refresh:
            out = []
            for info in self._list("runs"):
                if info.type != pafs.FileType.Directory:
                    continue
                run_id = info.base_name
                rel = f"runs/{run_id}/manifest.json"
                if self.exists(rel):
                    m = self.read_json(rel)
                    out.append(RunInfo(run_id, int(m["sequence"]), m))
            out.sort(key=lambda r: r.sequence)
            self._runs_cache = out
        return self._runs_cache

    def latest_run(self) -> RunInfo | None:
        runs = self.runs()
        return runs[-1] if runs else None

    def next_sequence(self) -> int:
        runs = self.runs(refresh=True)
        return runs[-1].sequence + 1 if runs else 1

    def uncommitted_run_dirs(self) -> list[str]:
        committed = {r.run_id for r in self.runs(refresh=True)}
        found = set()
        for top in ("runs",) + tuple(f"stages/{s.base_name}" for s in self._list("stages")):
            for info in self._list(top):
                if info.type == pafs.FileType.Directory and info.base_name not in committed:
                    found.add(f"{top}/{info.base_name}")
        return sorted(found)

    def sweep_uncommitted(self) -> list[str]:
        """Delete what killed runs left behind. Call only while holding the lock."""
        removed = self.uncommitted_run_dirs()
        for rel in removed:
            self.delete_dir(rel)
        return removed

    def commit(self, run_id: str, manifest: dict[str, Any], before_publish=None) -> None:
        """Write the manifest (the commit point), then publish staged files."""
        self.write_json(f"runs/{run_id}/manifest.json", manifest)
        self._runs_cache = None
        if before_publish is not None:
            before_publish()
        self.publish(manifest)

    def publish(self, manifest: dict[str, Any]) -> None:
        run_id = manifest["run_id"]
        for staged, final in manifest.get("publish", {}).items():
            src = f"runs/{run_id}/{staged}"
            if self.exists(src):
                self.move(src, final)

    def recover(self) -> None:
        """Finish publishing the latest committed run if it was killed mid-way."""
        latest = self.latest_run()
        if latest is not None:
            self.publish(latest.manifest)

    def published(self, final_rel: str) -> str | None:
        """Where a published file (catalog, hand-off) can be read now.

        If the latest committed run staged it but was stopped before moving it into
        place, read the staged copy: the committed state, not the one before it.
        """
        latest = self.latest_run()
        if latest is not None:
            for staged, final in latest.manifest.get("publish", {}).items():
                if final == final_rel and self.exists(f"runs/{latest.run_id}/{staged}"):
                    return f"runs/{latest.run_id}/{staged}"
        return final_rel if self.exists(final_rel) else None

    # ----------------------------------------------------------------- stage rows

    def stage_part_rel(self, stage: str, run_id: str, part: str) -> str:
        return f"stages/{stage}/{run_id}/part-{part}.parquet"

    def write_stage_part(self, stage: str, run_id: str, part: str, table: pa.Table,
                         writes: Iterable[tuple[str, str]]) -> None:
        """Write one batch's rows of a stage, and the ledger of what they cover.

        `writes` holds (doc_id, scope) pairs; scope "document" means the part holds
        every unit of that document at this stage.
        """
        table = table.sort_by([("doc_id", "ascending"), ("unit_id", "ascending")])
        self.write_table(self.stage_part_rel(stage, run_id, part), table, run_id=run_id)
        rows = sorted(set(writes))
        ledger = pa.table(
            {"stage": [stage] * len(rows), "doc_id": [d for d, _ in rows], "scope": [s for _, s in rows]},
            schema=schema.WRITES,
        )
        self.write_table(f"runs/{run_id}/writes/{stage}/part-{part}.parquet", ledger, run_id=run_id)

    def _sequences(self, include_run: str | None) -> dict[str, int]:
        seq = {r.run_id: r.sequence for r in self.runs()}
        if include_run is not None and include_run not in seq:
            seq[include_run] = max(seq.values(), default=0) + 1
        return seq

    def _committed(self, run_id: str) -> bool:
        return any(r.run_id == run_id for r in self.runs())

    def _ledger(self, stage: str, run_id: str) -> "Ledger":
        """Which documents a run's part files of a stage hold, and with what scope."""
        key = (self.base, stage, run_id)
        with _LEDGERS_LOCK:
            cached = _LEDGERS.get(key)
        if cached is not None:
            return cached
        files: dict[str, list[str]] = {}
        full: list[str] = []
        for info in self._list(f"runs/{run_id}/writes/{stage}"):
            name = info.base_name
            if not name.endswith(".parquet") or name.startswith(".tmp-"):
                continue
            # A ledger file is written once, whole; the running run's are read once each.
            with _LEDGERS_LOCK:
                entries = _LEDGER_FILES.get(info.path)
            if entries is None:
                t = pq.read_table(info.path, filesystem=self.fs, columns=["doc_id", "scope"])
                entries = list(zip(t.column("doc_id").to_pylist(), t.column("scope").to_pylist()))
                with _LEDGERS_LOCK:
                    _LEDGER_FILES[info.path] = entries
            part_file = self.path(f"stages/{stage}/{run_id}/{name}")
            for doc_id, scope in entries:
                files.setdefault(doc_id, []).append(part_file)
                if scope == "document":
                    full.append(doc_id)
        ledger = Ledger(files, full)
        if self._committed(run_id):
            with _LEDGERS_LOCK:
                _LEDGERS[key] = ledger
        return ledger

    def _stage_files(self, stage: str, run_ids: Iterable[str], doc_ids: Iterable[str] | None = None) -> list[str]:
        """Part files of a stage from these runs; with doc_ids, only files holding them."""
        wanted = None if doc_ids is None else set(doc_ids)
        files: list[str] = []
        for run_id in sorted(run_ids):
            ledger = self._ledger(stage, run_id)
            if wanted is None:
                found = {f for fs in ledger.files.values() for f in fs}
            else:
                found = {f for d in wanted for f in ledger.files.get(d, ())}
            files.extend(sorted(found))
        return files

    def doc_writes(self, stage: str) -> dict[str, list[str]]:
        """doc_id -> the committed runs whose part files of `stage` hold it, oldest first
        (read from the runs' small ledgers, not the stage tables)."""
        out: dict[str, list[str]] = {}
        for r in self.runs():
            for doc_id in self._ledger(stage, r.run_id).files:
                out.setdefault(doc_id, []).append(r.run_id)
        return out

    def stage_rows(self, stage: str, unit: str, doc_ids: Iterable[str] | None = None,
                   columns: list[str] | None = None, include_run: str | None = None,
                   extra_filter: ds.Expression | None = None) -> pa.Table:
        """All rows (every attempt) of a stage from committed runs (and `include_run`)."""
        seq = self._sequences(include_run)
        sch = schema.stage_schema(stage, unit)
        doc_ids = None if doc_ids is None else sorted(set(doc_ids))
        files = self._stage_files(stage, seq, doc_ids)
        if not files:
            return sch.empty_table() if columns is None else sch.empty_table().select(columns)
        dataset = ds.dataset(files, schema=sch, format="parquet", filesystem=self.fs)
        flt = extra_filter
        if doc_ids is not None:
            doc_filter = ds.field("doc_id").isin(doc_ids)
            flt = doc_filter if flt is None else (flt & doc_filter)
        return dataset.to_table(columns=columns, filter=flt)

    def _writes(self, stage: str, seq: dict[str, int]) -> pd.DataFrame:
        """Per run, the documents it rewrote whole at this stage."""
        docs: list[str] = []
        seqs: list[int] = []
        for run_id in seq:
            found = self._ledger(stage, run_id).full
            docs.extend(found)
            seqs.extend([seq[run_id]] * len(found))
        return pd.DataFrame({"doc_id": docs, "seq": seqs})

    def current(self, stage: str, unit: str, doc_ids: Iterable[str] | None = None,
                columns: list[str] | None = None, include_run: str | None = None) -> pa.Table:
        """Per unit, the latest attempt from a committed run (optionally also `include_run`).

        A run that rewrote a whole document at this stage retires that document's
        older units even where the new run produced no unit with the same id.
        """
        seq = self._sequences(include_run)
        need = None
        if columns is not None:
            need = list(dict.fromkeys(columns + ["run_id", "doc_id", "unit_id", "attempt"]))
        rows = self.stage_rows(stage, unit, doc_ids, need, include_run)
        if rows.num_rows == 0:
            return rows if columns is None else rows.select(columns)
        keys = pd.DataFrame({
            "run": rows.column("run_id").to_pylist(),
            "doc_id": rows.column("doc_id").to_pylist(),
            "unit_id": rows.column("unit_id").to_pylist(),
            "attempt": rows.column("attempt").to_pylist(),
        })
        keys["seq"] = keys["run"].map(seq)
        writes = self._writes(stage, seq)
        if len(writes):
            full = writes.groupby("doc_id")["seq"].max()
            floor = keys["doc_id"].map(full).fillna(0)
            keys = keys[keys["seq"] >= floor]
        keys = keys.sort_values(["unit_id", "seq", "attempt"])
        winners = np.sort(keys.drop_duplicates("unit_id", keep="last").index.to_numpy())
        out = rows.take(pa.array(winners))
        return out if columns is None else out.select(columns)

    def max_attempts(self, stage: str, unit: str, doc_ids: Iterable[str]) -> dict[str, int]:
        rows = self.stage_rows(stage, unit, doc_ids, ["unit_id", "attempt"])
        if rows.num_rows == 0:
            return {}
        df = rows.to_pandas()
        return df.groupby("unit_id")["attempt"].max().astype(int).to_dict()

    # ----------------------------------------------------------------- catalog and hand-off

    def catalog(self) -> pa.Table:
        rel = self.published("catalog.parquet")
        if rel is None:
            return schema.CATALOG.empty_table()
        return self.read_table(rel)

    def handoff(self) -> pa.Table | None:
        rel = self.published("handoff/chunks.parquet")
        return self.read_table(rel) if rel else None
