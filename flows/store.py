"""The stage store: Parquet datasets per stage, run manifests, the catalog, the hand-off.

Layout under the store root:
  stages/<stage>/<run_id>/part-<n>.parquet   rows a run wrote, one file per batch
  runs/<run_id>/writes/<stage>/part-<n>.parquet  which documents each part covered, and how
  runs/<run_id>/ledger.parquet               the same for every stage of the run, one file, at commit
  runs/<run_id>/manifest.json                written last: the run is committed
  runs/<run_id>/staged/...                   catalog and hand-off, published after commit
  catalog.parquet, handoff/chunks.parquet, handoff/changes/<run_id>.parquet
  stages/<stage>/_compacted.json             which runs' rows a compaction rewrote, and where
  stages/<stage>/_compacted/<gen>/...        those rows in few large files, sorted by document
  .lock                                      held by the one run writing to the store
  .lock-guard                                flocked while a run checks or takes over .lock

Every manifest records the size and SHA-256 of each file its run wrote (under the
name the file is published at), so `thresher verify` can prove them intact.

Readers only see runs whose manifest exists. Every file is written under a
temporary name and renamed into place, so a killed run leaves no partial file that
a reader could take for output.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
from contextlib import contextmanager
import secrets
import socket
import threading
import time
import uuid
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq


if TYPE_CHECKING:  # loaded where a filtered read needs it
    import pyarrow.dataset as ds

from thresher.flows import schema
from thresher.flows.arrow_groups import highest_per_key, run_ends
from thresher.flows.faults import fault

RUN_META_KEY = b"thresher.run_id"


def read_parquet(source: Any, columns: list[str] | None = None, use_threads: bool = True) -> pa.Table:
    """One whole Parquet file (an open file or a buffer) as a table.

    Through pyarrow's file reader, not `pq.read_table`, which builds a dataset for each
    file: half the CPU time on the store's small files (45 ledgers and parts read ten
    times: 1.3-1.6 s against 0.66-0.72 s). A column the file lacks raises, as
    `pq.read_table` does (the file reader would silently return an empty table).
    """
    f = pq.ParquetFile(source)
    if columns is not None:
        missing = [c for c in columns if c not in f.schema_arrow.names]
        if missing:
            raise pa.ArrowInvalid(f"no column {', '.join(missing)} in this Parquet file")
    return f.read(columns=columns, use_threads=use_threads)


# A committed run's files never change, so what they hold is cached for the process,
# shared by every Store object on the same root (tasks make their own): per
# (store base, stage, run id), which documents each part file holds and how.
_LEDGERS: dict[tuple[str, str, str], "Ledger"] = {}
_LEDGER_FILES: dict[str, list[tuple[str, str]]] = {}
# Committed runs' manifests by path: ((mtime_ns, size), RunInfo).
_MANIFESTS: dict[str, tuple[tuple, "RunInfo"]] = {}
# A running run's ledgers, with the ledger file names they were built from.
_RUNNING_LEDGERS: dict[tuple[str, str, str], tuple[tuple[str, ...], "Ledger"]] = {}
_LEDGERS_LOCK = threading.Lock()
_COMPACTED: dict[tuple[str, str, str], "CompactedLedger"] = {}
# (store base, run id) of committed runs whose one ledger file was looked for: whether
# their ledgers came from it (False: none, or unreadable; read part by part).
_RUN_LEDGER_READ: dict[tuple[str, str], bool] = {}


def forget_cached_ledgers() -> None:
    """Forget every ledger this process cached, as a new process starts (tests and
    benchmarks that read as a fresh `thresher trail` would). All of them together:
    _RUN_LEDGER_READ kept alone would make the next read take a run's ledgers as
    cached, and find them empty."""
    with _LEDGERS_LOCK:
        for cache in (_LEDGERS, _LEDGER_FILES, _RUNNING_LEDGERS, _COMPACTED, _RUN_LEDGER_READ):
            cache.clear()


# Up to this many documents, a read of a compacted stage looks up only their ledger
# entries instead of loading the whole ledger (a trail, a page re-run).
LEDGER_LOOKUP_DOCS = 64
# How every Parquet file of the store is written: zstd, and no dictionary encoding. The
# store's columns are mostly unique (ids, text, signatures) or few-valued and repeated
# in runs that zstd folds as well; Parquet's writer tried a dictionary for each column
# until it gave up. On the documentation drive's stage parts, without it: writing 15-45 %
# less CPU, reading whole parts 10-50 % less, dedup's parts 58 MB against 73 MB; the
# hand-off streamed 0.05 s against 0.13 s (scratch `pqw.py`, `pqr.py`, `pqh.py`).
WRITE_OPTIONS = {"compression": "zstd", "use_dictionary": False}
COMPACTED = "_compacted"
# Rows per row group of a file the store writes, at most.
ROW_GROUP_ROWS = 2048
# A stage part's row groups hold about this many bytes of Arrow data each (fewer rows
# when rows are large, as pages of text are): its rows are sorted by doc_id and a reader
# of a few documents filters on it, so Parquet's statistics let it skip the row groups
# that cannot hold them. One row group of a 1,899-page stage part (14 MB) was decoded
# whole for each batch of 32 documents (ours: whole-stage scans of the documentation
# drive's store took the same time with it, and the parts grew by 1-7 %).
PART_GROUP_BYTES = 1 << 20


def part_group_rows(table: pa.Table) -> int:
    """Rows per row group for a stage part: about PART_GROUP_BYTES each."""
    if table.num_rows == 0:
        return ROW_GROUP_ROWS
    per_row = max(1, table.nbytes // table.num_rows)
    return max(1, min(ROW_GROUP_ROWS, PART_GROUP_BYTES // per_row))


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


def _latest_attempts(rows: pa.Table, seq: dict[str, int], floors: dict[str, int]) -> np.ndarray:
    """Per row, whether it is its unit's latest attempt: from runs in `seq`, not older
    than the document's floor (its latest whole rewrite), latest by (run sequence,
    attempt). A boolean mask in row order, for Table.filter.

    Arrow compute and numpy, not pandas: a run asks this for a few documents at every
    stage, where pandas' fixed cost per call was most of the time (tools/profile_weekly.py).
    """
    runs = list(seq)
    run_pos = pc.index_in(rows.column("run_id"), value_set=pa.array(runs, pa.string()))
    run_seq = np.array([seq[r] for r in runs] + [-1], dtype=np.int64)
    seqs = run_seq[run_pos.fill_null(len(runs)).to_numpy(zero_copy_only=False)]
    keep = seqs >= 0  # rows of runs not (or no longer) committed are not current
    if floors:
        docs = list(floors)
        doc_pos = pc.index_in(rows.column("doc_id"), value_set=pa.array(docs, pa.string()))
        floor_of = np.array([floors[d] for d in docs] + [0], dtype=np.int64)
        keep &= seqs >= floor_of[doc_pos.fill_null(len(docs)).to_numpy(zero_copy_only=False)]
    kept = np.flatnonzero(keep)
    mask = pa.array(keep)
    keys = pa.table({"unit_id": rows.column("unit_id").filter(mask), "seq": seqs[kept],
                     "attempt": rows.column("attempt").filter(mask)})
    order = pc.sort_indices(keys, sort_keys=[("unit_id", "ascending"), ("seq", "ascending"),
                                             ("attempt", "ascending")]).to_numpy()
    latest = np.zeros(rows.num_rows, dtype=bool)
    if len(order) == 0:
        return latest
    # the last row of each unit in that order is its latest attempt
    last = run_ends(keys.column("unit_id").take(pa.array(order)).combine_chunks()).to_numpy(zero_copy_only=False)
    latest[kept[order[last]]] = True
    return latest


@dataclass
class Ledger:
    files: dict[str, list[str]]  # doc_id -> part files holding its rows
    full: list[str]  # doc_ids the run rewrote whole at the stage
    set_aside: frozenset = frozenset()  # doc_ids whose every write there was schema.SET_ASIDE
    full_set: frozenset = frozenset()

    def __post_init__(self):
        self.full_set = frozenset(self.full)

    @classmethod
    def of(cls, entries: Iterable[tuple[str, str, str]]) -> "Ledger":
        """From (doc_id, scope, part file) entries, in the order the parts were written."""
        files: dict[str, list[str]] = {}
        full: list[str] = []
        handed: set[str] = set()
        for doc_id, scope, part_file in entries:
            files.setdefault(doc_id, []).append(part_file)
            if scope == "document":
                full.append(doc_id)
            if scope != schema.SET_ASIDE:
                handed.add(doc_id)
        return cls(files, full, frozenset(files.keys() - handed))


@dataclass
class CompactedLedger:
    """A compacted stage: per document, (run_id, part file) pairs; whole-document rewrites."""
    files: dict[str, list[tuple[str, str]]]
    full: list[tuple[str, str]]  # (doc_id, run_id)
    full_by_doc: dict = field(default_factory=dict)  # doc_id -> run_ids

    def __post_init__(self):
        for d, r in self.full:
            self.full_by_doc.setdefault(d, []).append(r)


class StoreDamaged(StoreError):
    """A part file cannot be read; `path` names it."""

    def __init__(self, path: str, reason: str):
        super().__init__(f"cannot read {path}: {reason}; run `thresher verify` to see what it holds")
        self.path = path


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
        self._compaction_cache: dict[str, dict | None] = {}
        self._ledger_lookup: tuple | None = None  # the last few-document compacted ledger read

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
            with self.fs.open_output_stream(target) as out, pq.ParquetWriter(out, sch, **WRITE_OPTIONS) as w:
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

    def write_table(self, rel: str, table: pa.Table, run_id: str | None = None,
                    group_rows: int = ROW_GROUP_ROWS) -> None:
        if run_id is not None:
            meta = dict(table.schema.metadata or {})
            meta[RUN_META_KEY] = run_id.encode()
            table = table.replace_schema_metadata(meta)
        self._atomic_write(
            rel, lambda out: pq.write_table(table, out, row_group_size=group_rows, **WRITE_OPTIONS)
        )

    def write_json(self, rel: str, obj: Any) -> None:
        data = json.dumps(obj, indent=2, sort_keys=True, default=str).encode()
        self._atomic_write(rel, lambda out: out.write(data))

    def read_json(self, rel: str) -> Any:
        with self.fs.open_input_stream(self.path(rel)) as f:
            return json.loads(f.read())

    def read_table(self, rel: str, columns: list[str] | None = None) -> pa.Table:
        with self.fs.open_input_file(self.path(rel)) as f:
            return read_parquet(f, columns)

    def move(self, src_rel: str, dst_rel: str) -> None:
        self.fs.create_dir(self.path(dst_rel).rsplit("/", 1)[0], recursive=True)
        self.fs.move(self.path(src_rel), self.path(dst_rel))

    def delete_dir(self, rel: str) -> None:
        if self.exists(rel):
            self.fs.delete_dir(self.path(rel))

    def delete_file(self, rel: str) -> None:
        try:
            self.fs.delete_file(self.path(rel))
        except FileNotFoundError:
            pass

    def table_and_record(self, rel: str) -> tuple[pa.Table, list]:
        """A stored Parquet file's table and its [size, SHA-256], from one read of its bytes."""
        with self.fs.open_input_stream(self.path(rel)) as f:
            data = f.read()
        # One thread: a threaded decode from a buffer left Arrow's pool threads busy
        # for a moment after the read, and a process exiting then aborted ("terminate
        # called without an active exception") in about 1 of 20 exits.
        table = read_parquet(pa.BufferReader(data), use_threads=False)
        return table, [len(data), hashlib.sha256(data).hexdigest()]

    def file_record(self, rel: str) -> list:
        """[size in bytes, SHA-256] of a stored file, as the manifest records it."""
        h = hashlib.sha256()
        size = 0
        with self.fs.open_input_stream(self.path(rel)) as f:
            while True:
                block = f.read(1 << 20)
                if not block:
                    break
                h.update(block)
                size += len(block)
        return [size, h.hexdigest()]

    def files_under(self, rel: str) -> list[str]:
        """Store-relative paths of the files below a folder (none if it is missing)."""
        return sorted(i.path[len(self.base) + 1:] for i in self._list(rel, recursive=True)
                      if i.type == pafs.FileType.File and not i.base_name.startswith(".tmp-"))

    # ----------------------------------------------------------------- the lock

    LOCK = ".lock"
    LOCK_GUARD = ".lock-guard"
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
        (O_EXCL), and the check-remove-create of a stale lock's takeover runs under
        an flock on a guard file, so two runs that both find a dead holder's lock
        cannot both take it over (one would remove the other's new lock). On object
        storage the lock is advisory: thresher writes it, reads it back after a
        pause and gives way if another run's lock replaced it.
        """
        deadline = time.monotonic() + wait_seconds
        while True:
            with self._takeover_guard():
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

    @contextmanager
    def _takeover_guard(self):
        """An exclusive flock on `.lock-guard` (local stores); released when the process dies."""
        if not self._is_local():
            yield
            return
        Path(self.base).mkdir(parents=True, exist_ok=True)
        try:
            fd = os.open(Path(self.base) / self.LOCK_GUARD, os.O_CREAT | os.O_RDWR, 0o644)
        except OSError as exc:  # a read-only or full file system: say so, in one line
            raise StoreError(f"cannot write to store {self.root}: {exc.strerror or exc}") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            os.close(fd)  # closing releases the flock

    def _create_lock(self, run_id: str) -> bool:
        data = json.dumps(self._lock_info(run_id))
        if self._is_local():
            try:
                Path(self.base).mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise StoreError(f"cannot write to store {self.root}: {exc.strerror or exc}") from None
            try:
                fd = os.open(Path(self.base) / self.LOCK, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                return False
            except OSError as exc:  # a read-only or full file system: say so, in one line
                raise StoreError(f"cannot write to store {self.root}: {exc.strerror or exc}") from None
            with os.fdopen(fd, "w") as f:
                f.write(data)  # under the guard: no reader sees it half-written and takes it for stale
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
            self._compaction_cache = {}
            out = []
            dirs = [i.base_name for i in self._list("runs") if i.type == pafs.FileType.Directory]
            found = self.fs.get_file_info([self.path(f"runs/{r}/manifest.json") for r in dirs])
            for run_id, info in zip(dirs, found):
                if info.type == pafs.FileType.NotFound:
                    continue
                # A manifest is written once, whole (the commit): parsed once per process,
                # as every task's Store reads the runs again (what it holds is not changed).
                stamp = (info.mtime_ns, info.size)
                with _LEDGERS_LOCK:
                    cached = _MANIFESTS.get(info.path)
                if cached is None or cached[0] != stamp:
                    m = self.read_json(f"runs/{run_id}/manifest.json")
                    cached = (stamp, RunInfo(run_id, int(m["sequence"]), m))
                    with _LEDGERS_LOCK:
                        _MANIFESTS[info.path] = cached
                out.append(cached[1])
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
                if (info.type == pafs.FileType.Directory and info.base_name not in committed
                        and not info.base_name.startswith("_")):
                    found.add(f"{top}/{info.base_name}")
        return sorted(found)

    def sweep_uncommitted(self) -> list[str]:
        """Delete what killed runs left behind. Call only while holding the lock."""
        removed = self.uncommitted_run_dirs()
        for n, rel in enumerate(removed):
            if n:
                fault("mid-sweep")
            self.delete_dir(rel)
        return removed

    def run_files(self, run_id: str, publish: dict[str, str] | None = None) -> dict[str, list]:
        """Size and checksum of every file a run wrote, by the name it is read under."""
        rels = self.files_under(f"runs/{run_id}")
        for info in self._list("stages"):
            if info.type == pafs.FileType.Directory:
                rels += self.files_under(f"stages/{info.base_name}/{run_id}")
        out = {}
        for rel in rels:
            if rel == f"runs/{run_id}/manifest.json":
                continue
            inside = rel[len(f"runs/{run_id}/"):] if rel.startswith(f"runs/{run_id}/") else None
            out[(publish or {}).get(inside, rel)] = self.file_record(rel)
        return out

    def commit(self, run_id: str, manifest: dict[str, Any], before_publish=None) -> None:
        """Write the manifest (the commit point), then publish staged files."""
        manifest = dict(manifest)
        self._write_run_ledger(run_id)
        manifest["files"] = self.run_files(run_id, manifest.get("publish"))
        self.write_json(f"runs/{run_id}/manifest.json", manifest)
        self._runs_cache = None
        with _LEDGERS_LOCK:  # committed now: its ledgers are cached as such when next read
            for key in [k for k in _RUNNING_LEDGERS if k[0] == self.base and k[2] == run_id]:
                del _RUNNING_LEDGERS[key]
        if before_publish is not None:
            before_publish()
        self.publish(manifest)

    def publish(self, manifest: dict[str, Any]) -> None:
        run_id = manifest["run_id"]
        moved = 0
        for staged, final in manifest.get("publish", {}).items():
            src = f"runs/{run_id}/{staged}"
            if self.exists(src):
                if moved:
                    fault("mid-publish")
                self.move(src, final)
                moved += 1

    def recover(self) -> None:
        """Finish what a killed writer left half done. Call only while holding the lock.

        The latest committed run's publishing; a compaction's removal of the files it
        replaced (or of its own files, if it never switched over).
        """
        latest = self.latest_run()
        if latest is not None:
            self.publish(latest.manifest)
        for info in self._list("stages"):
            if info.type == pafs.FileType.Directory:
                self.finish_compaction(info.base_name)

    # ----------------------------------------------------------------- compaction records

    def compaction_rel(self, stage: str) -> str:
        return f"stages/{stage}/{COMPACTED}.json"

    def compaction(self, stage: str) -> dict | None:
        """The stage's compaction record: {"generation", "runs", "files"}, or None."""
        if stage not in self._compaction_cache:
            rel = self.compaction_rel(stage)
            self._compaction_cache[stage] = self.read_json(rel) if self.exists(rel) else None
        return self._compaction_cache[stage]

    def retired_changes(self) -> set[str]:
        """Runs whose change set retention removed (so verification does not miss it)."""
        if not self.exists("retention.json"):
            return set()
        return set(self.read_json("retention.json").get("changes_retired", []))

    def finish_compaction(self, stage: str, each=None) -> list[str]:
        """Remove what the stage's compaction record replaced, and unused generations."""
        rec = self.compaction(stage)
        gen = rec["generation"] if rec else None
        removed = []
        for info in self._list(f"stages/{stage}/{COMPACTED}"):
            if info.base_name != gen:
                removed.append(f"stages/{stage}/{COMPACTED}/{info.base_name}")
        for run_id in (rec["runs"] if rec else []):
            for rel in (f"stages/{stage}/{run_id}", f"runs/{run_id}/writes/{stage}"):
                if self.exists(rel):
                    removed.append(rel)
        for rel in removed:
            if each is not None:
                each(rel)
            self.delete_dir(rel)
        return removed

    def _compacted_ledger(self, stage: str, doc_ids: set[str] | None = None) -> CompactedLedger | None:
        """The compacted generation's ledger; with a few doc_ids and nothing cached, only
        their entries, read by a filter that skips row groups (the ledger is sorted by
        doc_id), so one document's trail does not parse the whole drive's ledger."""
        rec = self.compaction(stage)
        if rec is None:
            return None
        key = (self.base, stage, rec["generation"])
        with _LEDGERS_LOCK:
            cached = _COMPACTED.get(key)
        if cached is not None:
            return cached
        folder = f"stages/{stage}/{COMPACTED}/{rec['generation']}"
        if doc_ids is not None and len(doc_ids) <= LEDGER_LOOKUP_DOCS:
            look = (key, frozenset(doc_ids))
            if self._ledger_lookup is None or self._ledger_lookup[0] != look:
                import pyarrow.dataset as ds

                t = ds.dataset(self.path(f"{folder}/ledger.parquet"), format="parquet", filesystem=self.fs) \
                    .to_table(filter=ds.field("doc_id").isin(sorted(doc_ids)))
                self._ledger_lookup = (look, self._compacted_from(folder, t))
            return self._ledger_lookup[1]
        t = self.read_table(f"{folder}/ledger.parquet")
        ledger = self._compacted_from(folder, t)
        with _LEDGERS_LOCK:
            _COMPACTED[key] = ledger
        return ledger

    def _compacted_from(self, folder: str, t: pa.Table) -> CompactedLedger:
        files: dict[str, list[tuple[str, str]]] = {}
        full: list[tuple[str, str]] = []
        for run_id, doc_id, scope, part in zip(*(t.column(c).to_pylist() for c in ("run_id", "doc_id", "scope", "part"))):
            if part:
                files.setdefault(doc_id, []).append((run_id, self.path(f"{folder}/{part}")))
            if scope == "document":
                full.append((doc_id, run_id))
        return CompactedLedger(files, full)

    def part_files(self, stage: str) -> int:
        """How many part files a stage's rows are spread over now."""
        covered = set((self.compaction(stage) or {}).get("runs", []))
        n = 0
        for info in self._list(f"stages/{stage}"):
            if info.type == pafs.FileType.Directory and info.base_name not in covered:
                n += sum(1 for f in self._list(f"stages/{stage}/{info.base_name}", recursive=True)
                         if f.base_name.endswith(".parquet") and not f.base_name.startswith(".tmp-"))
        return n

    def publishers(self) -> dict[str, RunInfo]:
        """Each published file (its final path) and the latest committed run that
        published it, whose manifest records its size and SHA-256 (a run that kept a
        file as it was publishes no copy of it)."""
        out: dict[str, RunInfo] = {}
        for r in self.runs():
            for final in r.manifest.get("publish", {}).values():
                out[final] = r
        return out

    def published_record(self, final_rel: str) -> list | None:
        """[size, SHA-256] of a published file as recorded by the run that published it."""
        r = self.publishers().get(final_rel)
        return None if r is None else (r.manifest.get("files") or {}).get(final_rel)

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
        self.write_table(self.stage_part_rel(stage, run_id, part), table, run_id=run_id,
                         group_rows=part_group_rows(table))
        fault("part-before-ledger")
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

    def run_ledger_rel(self, run_id: str) -> str:
        return f"runs/{run_id}/ledger.parquet"

    def _ledger_files(self, run_id: str, stage: str) -> list[pafs.FileInfo]:
        """A run's ledger files of a stage, whole ones only (not a write in progress)."""
        return [i for i in self._list(f"runs/{run_id}/writes/{stage}")
                if i.base_name.endswith(".parquet") and not i.base_name.startswith(".tmp-")]

    def _ledger_entries(self, paths: list[str]) -> dict[str, list[tuple[str, str]]]:
        """(doc_id, scope) entries of each ledger file, cached by path: a ledger file is
        written once, whole. Files not read yet are read in one parallel scan when there
        are several (a commit's 942 files: 0.24 s against 0.66 s one by one), else, or if
        that scan fails, one by one, so a damaged file raises as a read of it does."""
        out: dict[str, list[tuple[str, str]]] = {}
        with _LEDGERS_LOCK:
            for path in paths:
                if path in _LEDGER_FILES:
                    out[path] = _LEDGER_FILES[path]
        unread = [p for p in paths if p not in out]
        if len(unread) > 1:
            import pyarrow.dataset as ds

            found: dict[str, list[tuple[str, str]]] = {p: [] for p in unread}
            try:
                scan = ds.dataset(unread, format="parquet", filesystem=self.fs).scanner(columns=["doc_id", "scope"])
                for tagged in scan.scan_batches():
                    b = tagged.record_batch
                    found[tagged.fragment.path].extend(zip(b.column("doc_id").to_pylist(),
                                                           b.column("scope").to_pylist()))
            except (OSError, pa.ArrowException, KeyError):
                found = {}
            out.update(found)
        for path in (p for p in unread if p not in out):
            with self.fs.open_input_file(path) as f:
                t = read_parquet(f, ["doc_id", "scope"])
            out[path] = list(zip(t.column("doc_id").to_pylist(), t.column("scope").to_pylist()))
        with _LEDGERS_LOCK:
            for path in unread:
                _LEDGER_FILES[path] = out[path]
        return out

    def _part_ledgers(self, run_id: str) -> dict[str, list[tuple[str, list[tuple[str, str]]]]]:
        """stage -> (part name, its (doc_id, scope) entries) for each ledger file the run wrote."""
        stages = {info.base_name: sorted(self._ledger_files(run_id, info.base_name), key=lambda f: f.base_name)
                  for info in self._list(f"runs/{run_id}/writes") if info.type == pafs.FileType.Directory}
        entries = self._ledger_entries([f.path for files in stages.values() for f in files])
        return {stage: [(f.base_name, entries[f.path]) for f in files] for stage, files in sorted(stages.items())}

    def _write_run_ledger(self, run_id: str) -> None:
        """runs/<run_id>/ledger.parquet: the run's per-part ledgers in one file (RUN_LEDGER).
        None for a run that wrote no part (a quiet week): its readers find no file and
        list an empty folder, as cheap as reading one."""
        parts_by_stage = self._part_ledgers(run_id)
        if not parts_by_stage:
            return
        cols: dict[str, list[str]] = {"stage": [], "part": [], "doc_id": [], "scope": []}
        for stage, parts in parts_by_stage.items():
            for part, entries in parts:
                for doc_id, scope in entries:
                    cols["stage"].append(stage)
                    cols["part"].append(part)
                    cols["doc_id"].append(doc_id)
                    cols["scope"].append(scope)
        self.write_table(self.run_ledger_rel(run_id), pa.table(cols, schema=schema.RUN_LEDGER), run_id=run_id)

    def _from_run_ledger(self, run_id: str) -> bool:
        """Cache every stage's Ledger of a committed run from its one ledger file; False
        when it has none (written before this file existed) or it cannot be read, and
        the per-part files are read instead."""
        rel = self.run_ledger_rel(run_id)
        try:
            t = self.read_table(rel).select(["stage", "part", "doc_id", "scope"])
        except (OSError, pa.ArrowException, KeyError):
            with _LEDGERS_LOCK:
                _RUN_LEDGER_READ[(self.base, run_id)] = False
            return False
        per: dict[str, list[tuple[str, str, str]]] = {}
        for stage, part, doc_id, scope in zip(*(t.column(c).to_pylist() for c in ("stage", "part", "doc_id", "scope"))):
            per.setdefault(stage, []).append((doc_id, scope, self.path(f"stages/{stage}/{run_id}/{part}")))
        with _LEDGERS_LOCK:
            _RUN_LEDGER_READ[(self.base, run_id)] = True
            for stage, entries in per.items():
                _LEDGERS.setdefault((self.base, stage, run_id), Ledger.of(entries))
        return True

    def _ledger(self, stage: str, run_id: str) -> "Ledger":
        """Which documents a run's part files of a stage hold, and with what scope."""
        key = (self.base, stage, run_id)
        with _LEDGERS_LOCK:
            cached = _LEDGERS.get(key)
            from_file = _RUN_LEDGER_READ.get((self.base, run_id))
        if cached is not None:
            return cached
        if from_file is None and self._committed(run_id):
            from_file = self._from_run_ledger(run_id)
        if from_file:
            with _LEDGERS_LOCK:
                # A stage the run wrote nothing at has no entry: an empty ledger.
                return _LEDGERS.setdefault(key, Ledger({}, []))
        infos = self._ledger_files(run_id, stage)
        # A running run's ledger grows by whole files: while the listing is the same,
        # so is the ledger (asked at every stage of every read, it was rebuilt each time).
        names = tuple(sorted(i.base_name for i in infos))
        with _LEDGERS_LOCK:
            running = _RUNNING_LEDGERS.get(key)
        if running is not None and running[0] == names:
            return running[1]
        # The running run's ledger files are read once each, as they appear.
        entries_of = self._ledger_entries([i.path for i in infos])
        ledger = Ledger.of((doc_id, scope, self.path(f"stages/{stage}/{run_id}/{info.base_name}"))
                           for info in infos for doc_id, scope in entries_of[info.path])
        committed = self._committed(run_id)
        with _LEDGERS_LOCK:
            if committed:
                _LEDGERS[key] = ledger
                _RUNNING_LEDGERS.pop(key, None)
            else:
                _RUNNING_LEDGERS[key] = (names, ledger)
        return ledger

    def run_docs(self, stage: str, run_id: str, handed_off: bool = False) -> set[str]:
        """The documents a run (running or committed) wrote rows of at a stage; with
        `handed_off`, less those it wrote there only as schema.SET_ASIDE (nothing of
        them the hand-off holds changed there)."""
        ledger = self._ledger(stage, run_id)
        return set(ledger.files) - ledger.set_aside if handed_off else set(ledger.files)

    def _stage_files(self, stage: str, seq: dict[str, int], doc_ids: Iterable[str] | None = None,
                     floors: dict[str, int] | None = None) -> list[str]:
        """Part files of a stage from these runs; with doc_ids, only files holding them.

        With `floors` (doc_id -> sequence of its latest whole-document rewrite), a file is
        read for a document only if its run is not older than that rewrite: the current
        view never needs older files, so one damaged old part does not block it.
        """
        wanted = None if doc_ids is None else set(doc_ids)
        floors = floors or {}
        files: list[str] = []
        compacted = self._compacted_ledger(stage, wanted)
        covered = set((self.compaction(stage) or {}).get("runs", []))
        if compacted is not None:
            found = set()
            pairs = (compacted.files.items() if wanted is None
                     else ((d, compacted.files.get(d, ())) for d in wanted))
            for d, entries in pairs:
                floor = floors.get(d, 0)
                found |= {f for run_id, f in entries if run_id in seq and seq[run_id] >= floor}
            files.extend(sorted(found))
        for run_id in sorted(seq):
            if run_id in covered:
                continue
            ledger = self._ledger(stage, run_id)
            if wanted is None:
                found = {f for fs in ledger.files.values() for f in fs}
            else:
                found = {f for d in wanted if seq[run_id] >= floors.get(d, 0) for f in ledger.files.get(d, ())}
            files.extend(sorted(found))
        return files

    def doc_writes(self, stage: str) -> dict[str, list[str]]:
        """doc_id -> the committed runs whose part files of `stage` hold it, oldest first
        (read from the runs' small ledgers, not the stage tables)."""
        out: dict[str, list[str]] = {}
        seq = {r.run_id: r.sequence for r in self.runs()}
        covered = set((self.compaction(stage) or {}).get("runs", []))
        compacted = self._compacted_ledger(stage)
        if compacted is not None:
            for doc_id, entries in compacted.files.items():
                out[doc_id] = sorted({r for r, _ in entries if r in seq}, key=seq.get)
        for r in self.runs():
            if r.run_id in covered:
                continue
            for doc_id in self._ledger(stage, r.run_id).files:
                out.setdefault(doc_id, []).append(r.run_id)
        return out

    def doc_parts(self, stage: str, include_run: str | None = None) -> dict[str, list[str]]:
        """doc_id -> the part files of `stage` that hold it (compacted ones first, then by
        run, `include_run` last), from the ledgers: a reader that wants a few documents
        can group them by file."""
        out: dict[str, list[str]] = {}
        covered = set((self.compaction(stage) or {}).get("runs", []))
        compacted = self._compacted_ledger(stage)
        if compacted is not None:
            for doc_id, entries in compacted.files.items():
                out[doc_id] = [f for _, f in entries]
        for run_id in self._sequences(include_run):
            if run_id in covered:
                continue
            for doc_id, files in self._ledger(stage, run_id).files.items():
                out.setdefault(doc_id, []).extend(files)
        return out

    def _read(self, files: list[str], sch: pa.Schema, columns: list[str] | None,
              flt: ds.Expression | None, tolerant: bool) -> pa.Table:
        """Rows of these part files; a file that cannot be read raises StoreDamaged
        naming it, or with `tolerant` is left out (attempt counts need no more)."""
        import pyarrow.dataset as ds

        try:
            dataset = ds.dataset(files, schema=sch, format="parquet", filesystem=self.fs)
            return dataset.to_table(columns=columns, filter=flt)
        except (OSError, pa.ArrowException) as exc:
            first_error = exc
        parts = []
        for f in files:
            try:
                parts.append(ds.dataset([f], schema=sch, format="parquet", filesystem=self.fs)
                             .to_table(columns=columns, filter=flt))
            except (OSError, pa.ArrowException) as exc:
                if not tolerant:
                    raise StoreDamaged(f[len(self.base) + 1:] if f.startswith(self.base) else f,
                                       str(exc).splitlines()[0]) from None
        if not parts and not tolerant:
            raise first_error
        empty = sch.empty_table() if columns is None else sch.empty_table().select(columns)
        return pa.concat_tables(parts) if parts else empty

    def stage_rows(self, stage: str, unit: str, doc_ids: Iterable[str] | None = None,
                   columns: list[str] | None = None, include_run: str | None = None,
                   extra_filter: ds.Expression | None = None, floors: dict[str, int] | None = None,
                   tolerant: bool = False) -> pa.Table:
        """All rows (every attempt) of a stage from committed runs (and `include_run`)."""
        seq = self._sequences(include_run)
        sch = schema.stage_schema(stage, unit)
        doc_ids = None if doc_ids is None else sorted(set(doc_ids))
        files = self._stage_files(stage, seq, doc_ids, floors)
        if not files:
            return sch.empty_table() if columns is None else sch.empty_table().select(columns)
        flt = extra_filter
        if doc_ids is not None:
            import pyarrow.dataset as ds

            doc_filter = ds.field("doc_id").isin(doc_ids)
            flt = doc_filter if flt is None else (flt & doc_filter)
        return self._read(files, sch, columns, flt, tolerant)

    def _writes(self, stage: str, seq: dict[str, int]) -> dict[str, int]:
        """Per document, the sequence of the latest run that rewrote it whole at this stage."""
        latest: dict[str, int] = {}

        def note(doc_id: str, s: int) -> None:
            if s > latest.get(doc_id, 0):
                latest[doc_id] = s

        covered = set((self.compaction(stage) or {}).get("runs", []))
        compacted = self._compacted_ledger(stage)
        if compacted is not None:
            for doc_id, run_id in compacted.full:
                if run_id in seq:
                    note(doc_id, seq[run_id])
        for run_id, s in seq.items():
            if run_id in covered:
                continue
            for doc_id in self._ledger(stage, run_id).full:
                note(doc_id, s)
        return latest

    def _floors(self, stage: str, seq: dict[str, int], doc_ids: set[str]) -> dict[str, int]:
        """Per document, the sequence of the latest run that rewrote it whole here."""
        floors: dict[str, int] = {}
        covered = set((self.compaction(stage) or {}).get("runs", []))
        compacted = self._compacted_ledger(stage, doc_ids)
        if compacted is not None:
            for d in doc_ids:
                for run_id in compacted.full_by_doc.get(d, ()):
                    if run_id in seq and seq[run_id] > floors.get(d, 0):
                        floors[d] = seq[run_id]
        for run_id, s in seq.items():
            if run_id in covered:
                continue
            full = self._ledger(stage, run_id).full_set
            for d in (doc_ids & full if len(doc_ids) < len(full) else full & doc_ids):
                if s > floors.get(d, 0):
                    floors[d] = s
        return floors

    def current(self, stage: str, unit: str, doc_ids: Iterable[str] | None = None,
                columns: list[str] | None = None, include_run: str | None = None,
                tolerant: bool = False) -> pa.Table:
        """Per unit, the latest attempt from a committed run (optionally also `include_run`).

        A run that rewrote a whole document at this stage retires that document's
        older units even where the new run produced no unit with the same id.
        """
        seq = self._sequences(include_run)
        need = None
        if columns is not None:
            need = list(dict.fromkeys(columns + ["run_id", "doc_id", "unit_id", "attempt"]))
        if doc_ids is not None:
            doc_ids = set(doc_ids)
            floors = self._floors(stage, seq, doc_ids)
        else:
            floors = self._writes(stage, seq)
        rows = self.stage_rows(stage, unit, doc_ids, need, include_run,
                               floors=floors if doc_ids is not None else None, tolerant=tolerant)
        if rows.num_rows == 0:
            return rows if columns is None else rows.select(columns)
        latest = _latest_attempts(rows, seq, floors)
        # Every row the latest (the usual case): no copy. A week's read of dedup's stored
        # signatures for 55,418 chunks: 0.18-0.37 s with the copy, 0.14-0.24 s without
        # (scratch timing, three rounds each). Otherwise a filter, not a take: Arrow's
        # take over a table of many part files' chunks is slow on list columns (dedup's
        # stored rows after a few weeks, 61,116 rows in 142 chunks, 57,015 current: take
        # 0.32-0.63 s, filter 0.04-0.10 s, scratch timing, three rounds).
        out = rows if latest.all() else rows.filter(pa.array(latest))
        return out if columns is None else out.select(columns)

    def max_attempts(self, stage: str, unit: str, doc_ids: Iterable[str]) -> dict[str, int]:
        rows = self.stage_rows(stage, unit, doc_ids, ["unit_id", "attempt"], tolerant=True)
        if rows.num_rows == 0:
            return {}
        return highest_per_key(rows.column("unit_id"), rows.column("attempt"))

    # ----------------------------------------------------------------- catalog and hand-off

    def read_published(self, final_rel: str) -> tuple[pa.Table, list] | None:
        """A published file's table and its [size, SHA-256], read from one set of bytes.

        A run may publish (move the staged copy into place) between finding the file
        and opening it: then the runs are read again and the file looked up anew.
        """
        for attempt in range(3):
            rel = self.published(final_rel)
            if rel is None:
                return None
            try:
                return self.table_and_record(rel)
            except FileNotFoundError:
                self.runs(refresh=True)
                continue
        raise StoreError(f"{final_rel} kept moving while it was read; try again")

    def catalog(self) -> pa.Table:
        found = self.read_published("catalog.parquet")
        return schema.CATALOG.empty_table() if found is None else found[0]

    def handoff(self) -> pa.Table | None:
        found = self.read_published("handoff/chunks.parquet")
        return None if found is None else found[0]
