"""Finding the source files under the source root and naming them by content."""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

HASH_CHUNK = 1 << 20


@dataclass(frozen=True)
class SourceFile:
    source_path: str  # relative to the source root, with forward slashes
    abs_path: str
    size: int
    mtime: float
    doc_id: str


@dataclass(frozen=True)
class ScanProblem:
    source_path: str
    reason: str


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


def matches(rel_path: str, patterns: list[str]) -> bool:
    return any(_glob_regex(p).match(rel_path) for p in patterns)


def file_doc_id(path: str | os.PathLike[str]) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(HASH_CHUNK):
            h.update(block)
    return h.hexdigest()


def scan(root: str | os.PathLike[str], include: list[str], exclude: list[str]) -> tuple[list[SourceFile], list[ScanProblem]]:
    """Every regular file under root that include matches and exclude does not.

    Symbolic links to folders are not followed (a drive can hold loops); a file that
    cannot be read is reported as a problem, not an error.
    """
    root = Path(root)
    found: list[SourceFile] = []
    problems: list[ScanProblem] = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        dirnames.sort()
        for name in sorted(filenames):
            full = Path(dirpath) / name
            rel = full.relative_to(root).as_posix()
            if not matches(rel, include) or matches(rel, exclude):
                continue
            try:
                st = full.stat()
                if not full.is_file():
                    continue
                doc_id = file_doc_id(full)
            except OSError as exc:
                problems.append(ScanProblem(rel, f"cannot read file: {exc.strerror or exc}"))
                continue
            found.append(SourceFile(rel, str(full), st.st_size, st.st_mtime, doc_id))
    return found, problems
