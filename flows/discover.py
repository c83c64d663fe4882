"""Finding the source files under the source root and naming them by content."""

from __future__ import annotations

import errno
import hashlib
import os
import re
import stat
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

from thresher.steps.units import spelled

HASH_CHUNK = 1 << 20
# Stat and hash run in a few threads where that pays: on a network share each call waits
# on the server (common practice: a small fixed bound). On a local disk a pool costs more
# than it saves: handing each of 3,503 files of a documentation drive to 8 threads took
# 0.39-0.54 s against 0.10 s inline when nothing had changed, and 0.65-0.72 s against
# 0.26 s when every file was hashed from the page cache (2 cores). So the scan stats
# inline, a window of SCAN_WINDOW files at a time, and hands the rest to the pool as soon
# as a window's calls take over SLOW_CALL seconds each on average (a slow file system,
# or large files to hash, which hashlib does off the interpreter lock; ours: about four times
# what the pool cost per file here).
SCAN_THREADS = 8
SCAN_WINDOW = 64
SLOW_CALL = 0.0005
# The stat fields that must all match the catalog for a path's stored doc_id to be reused.
STAT_FIELDS = ("size", "mtime_ns", "inode", "device", "ctime_ns")
# A file the scan reads to hash is kept in memory for its extraction, so a new or
# changed file is read from the drive once, not once to hash and again to extract: up
# to KEEP_FILE_BYTES a file and KEEP_BYTES a scan in all (ours: a week's changed files
# on a working drive mostly fit; a larger file, or one past the budget on a first run,
# is hashed in blocks and read again when its turn comes).
KEEP_FILE_BYTES = 16 << 20
KEEP_BYTES = 64 << 20


@dataclass(frozen=True)
class SourceFile:
    source_path: str  # relative to the source root, with forward slashes
    abs_path: str
    size: int
    mtime: float
    doc_id: str
    mtime_ns: int = 0
    inode: int = 0
    device: int = 0
    ctime_ns: int = 0
    hashed: bool = True  # False: doc_id reused from the catalog, the bytes were not read
    facts: Any = None  # access.FileFacts: owner, group, mode bits, ACL entries
    # The bytes the scan hashed, when kept for extraction (KEEP_FILE_BYTES, KEEP_BYTES).
    data: bytes | None = field(default=None, repr=False, compare=False)


@dataclass(frozen=True)
class ScanProblem:
    source_path: str
    reason: str
    # True: reading was refused (EACCES, EPERM). Access taken away is meant, so what
    # the store last read there is removed; any other error (a share off line, a link
    # whose target is gone) holds it as stored (plan.make_plan).
    denied: bool = False


def _denied(exc: OSError) -> bool:
    return exc.errno in (errno.EACCES, errno.EPERM)


@lru_cache(maxsize=256)
def _glob_regex(pattern: str) -> re.Pattern[str]:
    """Glob to regex: '**/' spans folders (or none), '*' and '?' stay within one."""
    out, i = "", 0
    while i < len(pattern):
        if pattern.startswith("**/", i):
            out += "(?:.*/)?"
            i += 3
        elif pattern.startswith("**", i):
            out += ".*"
            i += 2
        elif pattern[i] == "*":
            out += "[^/]*"
            i += 1
        elif pattern[i] == "?":
            out += "[^/]"
            i += 1
        else:
            out += re.escape(pattern[i])
            i += 1
    return re.compile(out + r"\Z")


@lru_cache(maxsize=64)
def _any_glob(patterns: tuple[str, ...]) -> re.Pattern[str] | None:
    """One regex for a list of globs: a scan asks it of every path, include and exclude."""
    if not patterns:
        return None
    return re.compile("|".join(f"(?:{_glob_regex(p).pattern})" for p in patterns))


def matches(rel_path: str, patterns: list[str]) -> bool:
    rx = _any_glob(tuple(patterns))
    return rx is not None and rx.match(rel_path) is not None


def file_doc_id(path: str | os.PathLike[str]) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(HASH_CHUNK):
            h.update(block)
    return h.hexdigest()


class _Keep:
    """The scan's budget of bytes kept for extraction, shared by its threads."""

    def __init__(self, total: int) -> None:
        self.left = total
        self.lock = threading.Lock()

    def take(self, size: int) -> bool:
        if size > KEEP_FILE_BYTES:
            return False
        with self.lock:
            if size > self.left:
                return False
            self.left -= size
            return True


def _read_and_hash(path: str, size: int, keep: _Keep | None) -> tuple[str, bytes | None]:
    """(doc_id, bytes kept for extraction or None): one read of the file either way."""
    if keep is None or not keep.take(size):
        return file_doc_id(path), None
    with open(path, "rb") as f:
        data = f.read()
    return hashlib.sha256(data).hexdigest(), data


def unread_id(rel: str, st: os.stat_result) -> str:
    """The doc_id of a file larger than the chain reads (FlowDefinition.source_limit):
    not the hash of bytes never read, but one fixed by its path, size and modification
    time, so any change to the file makes a new one. The chain fails it as too large."""
    return hashlib.sha256(f"thresher: not read, too large\x1f{rel}\x1f{st.st_size}\x1f{st.st_mtime_ns}"
                          .encode("utf-8")).hexdigest()


def stat_record(st: os.stat_result) -> dict[str, int]:
    """The catalog's stat record of a file (see STAT_FIELDS)."""
    # Device numbers can exceed int64 on some systems; the catalog stores int64.
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "inode": st.st_ino & 0x7FFF_FFFF_FFFF_FFFF,
            "device": st.st_dev & 0x7FFF_FFFF_FFFF_FFFF, "ctime_ns": st.st_ctime_ns}


def _utf8(rel: str) -> bool:
    """Whether a path can be stored as it is (units.spelled)."""
    return spelled(rel) == rel


CANNOT_LIST = ("cannot list the folder, so its files are not in this run (documents of it that earlier "
               "runs read are kept as stored, or removed where reading was refused)")
NOT_UTF8 = ("the file name is not valid UTF-8 (the bytes that are not are shown as \\xNN); "
            "rename the file, or its folder, to read it")


def _look(full: str, rel: str, known: dict | None, verify: bool,
          keep: _Keep | None = None, read_limit: int | None = None) -> SourceFile | ScanProblem | None:
    """Stat one file; hash it unless the catalog's stat record for its path still matches,
    or it is larger than `read_limit` (unread_id)."""
    from thresher.flows.access import read_facts  # access imports this module's globs

    if not _utf8(rel):
        return ScanProblem(spelled(rel), NOT_UTF8) if os.path.isfile(full) else None
    try:
        st = os.stat(full)
        if not stat.S_ISREG(st.st_mode):  # what is_file() asks, without a second stat
            return None
        rec = stat_record(st)
        too_large = read_limit is not None and st.st_size > read_limit
        unchanged = not verify and known is not None and known.get("doc_id") \
            and all(known.get(k) == rec[k] for k in STAT_FIELDS)
        data, hashed = None, False
        if unchanged and (too_large or known["doc_id"] != unread_id(rel, st)):  # left unread: read once allowed
            doc_id = known["doc_id"]
        elif too_large:  # a drive's disk images and videos: the chain would not read them either
            doc_id = unread_id(rel, st)
        else:
            (doc_id, data), hashed = _read_and_hash(full, st.st_size, keep), True
    except OSError as exc:
        return ScanProblem(rel, f"cannot read file: {exc.strerror or exc}", _denied(exc))
    return SourceFile(rel, full, st.st_size, st.st_mtime, doc_id, rec["mtime_ns"], rec["inode"], rec["device"],
                      rec["ctime_ns"], hashed=hashed, facts=read_facts(full, st), data=data)


def known_files(catalog_rows: list[dict]) -> dict[str, dict]:
    """The catalog's present rows by source path: the stat records the scan matches."""
    return {r["source_path"]: r for r in catalog_rows if r["present"]}


def scan(root: str | os.PathLike[str], include: list[str], exclude: list[str],
         known: dict[str, dict] | None = None, verify: bool = False,
         threads: int = SCAN_THREADS, keep_bytes: int = KEEP_BYTES,
         slow_call: float = SLOW_CALL, read_limit: int | None = None) -> tuple[list[SourceFile], list[ScanProblem]]:
    """Every regular file under root that include matches and exclude does not.

    `known` maps a source path to its catalog row from the last run: when size,
    modification and change time (ns), inode and device all match, the stored doc_id
    is reused and the file is not read. `verify` hashes every file regardless. Files are
    looked at inline, and in a pool of `threads` once the calls slow down (_each). A file
    read to hash keeps its bytes (SourceFile.data) within `keep_bytes` in all, for its
    extraction to use instead of reading the drive again.
    Symbolic links to folders are not followed (a drive can hold loops); a file that
    cannot be read is reported as a problem, not an error. A file larger than
    `read_limit` (the chain's FlowDefinition.source_limit) is not read at all: its
    doc_id is unread_id's, and the chain fails it as too large.
    """
    known = known or {}
    keep = _Keep(keep_bytes)
    found: list[SourceFile] = []
    problems: list[ScanProblem] = []
    for r in _each(lambda fr: _look(fr[0], fr[1], known.get(fr[1]), verify, keep, read_limit),
                   _candidates(root, include, exclude, problems), threads, slow_call):
        if isinstance(r, SourceFile):
            found.append(r)
        elif isinstance(r, ScanProblem):
            problems.append(r)
    return found, problems


def _each(fn: Callable[[Any], Any], items: list, threads: int, slow_call: float = SLOW_CALL) -> Iterator[Any]:
    """fn of each item, in order: inline while the calls are quick, the rest in a pool of
    `threads` once a window of them averages over `slow_call` seconds. Stopping early
    (a caller that has its answer) cancels what the pool has not started."""
    at = 0
    while at < len(items):
        window = items[at:at + SCAN_WINDOW]
        t = time.perf_counter()
        for item in window:
            yield fn(item)
        at += len(window)
        if threads > 1 and time.perf_counter() - t > slow_call * len(window):
            break
    if at >= len(items):
        return
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="thresher-scan")
    try:
        yield from pool.map(fn, items[at:])
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _candidates(root: str | os.PathLike[str], include: list[str], exclude: list[str],
                unlisted: list[ScanProblem] | None = None) -> list[tuple[str, str]]:
    """(full path, source path) of every file name under root the globs select, sorted.
    A folder that cannot be listed is added to `unlisted` (os.walk would skip it in
    silence, and its files would look removed)."""
    todo: list[tuple[str, str]] = []
    # Paths as strings: pathlib's parsing per file was most of a quiet week's scan.
    top = str(Path(root))

    def cannot_list(exc: OSError) -> None:
        if unlisted is not None:
            folder = os.path.relpath(exc.filename, top).replace(os.sep, "/") if exc.filename else "."
            unlisted.append(ScanProblem(spelled(folder) + "/", f"{CANNOT_LIST}: {exc.strerror or exc}",
                                        _denied(exc)))

    for dirpath, dirnames, filenames in os.walk(top, followlinks=False, onerror=cannot_list):
        dirnames.sort()
        base = str(Path(dirpath))  # the folder as pathlib spells it, once per folder
        folder = os.path.relpath(dirpath, top).replace(os.sep, "/")
        prefix = "" if folder == "." else folder + "/"
        for name in sorted(filenames):
            rel = prefix + name
            if not matches(rel, include) or matches(rel, exclude):
                continue
            todo.append((os.path.join(base, name), rel))
    return todo


def new_or_changed(root: str | os.PathLike[str], include: list[str], exclude: list[str],
                   known: dict[str, dict], threads: int = SCAN_THREADS, slow_call: float = SLOW_CALL) -> bool:
    """Whether any selected file under root is missing from `known` (catalog rows by
    source path) or has another stat record: the scan's question, asked without
    reading a byte, before a run decides to start its workers."""
    def differs(fr: tuple[str, str]) -> bool:
        if not _utf8(fr[1]):
            return False  # the scan reports it; no document to process
        row = known.get(fr[1])
        if row is None:
            return True
        try:
            st = os.stat(fr[0])
        except OSError:
            return False  # the scan reports it; no document to process
        rec = stat_record(st)
        return any(row.get(k) != rec[k] for k in STAT_FIELDS)

    # any() stops at the first new or changed file: a week with edits answers early.
    return any(_each(differs, _candidates(root, include, exclude), threads, slow_call))
