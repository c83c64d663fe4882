"""Guards shared by every reader that opens documents inside a document (archives,
compressed files, e-mail): how many, how large, how deeply nested, which names.

Everything is unpacked in memory and never written anywhere: a member is read with a
cap one byte over what is still allowed, so an archive that lies about its sizes
cannot make us hold more than the limit.
"""

from __future__ import annotations

import bz2
import gzip
import io
import lzma
import posixpath
import re
import zlib
from dataclasses import dataclass, field

from ..units import Member, spelled
from .blocks import DocumentFailure, ReaderInput

MB = 1_000_000

# Archives smaller than this once unpacked are not judged by their compression ratio:
# a small file of blank lines or a repeated form compresses far beyond 100:1 and is
# harmless at that size (our rule of thumb).
RATIO_FLOOR_BYTES = 1 * MB

COMPRESSED_FORMATS = {"gzip": "gzip", "bzip2": "bzip2", "xz": "xz"}

_DRIVE = re.compile(r"^[A-Za-z]:")


def check_nesting(inp: ReaderInput, what: str) -> None:
    """A container inside too many containers is refused before it is opened."""
    limit = inp.params.max_nesting
    if inp.depth >= limit:
        raise DocumentFailure(
            f"nested too deep: this {what} sits inside {inp.depth} containers, over the limit of "
            f"{limit} (max_nesting)")


def check_count(count: int, limit: int, what: str) -> None:
    if count > limit:
        raise DocumentFailure(f"too many members: the {what} holds {count:,}, over the limit of "
                              f"{limit:,} (max_members)")


def safe_member_name(name: str, what: str) -> str:
    """The member's name as a relative path; DocumentFailure when it escapes the archive.

    An absolute name, a drive letter or a `..` part could point outside the folder the
    archive is unpacked into (the "zip slip" pattern); such an archive is refused whole.
    """
    clean = name.replace("\\", "/")
    parts = clean.split("/")
    if clean.startswith("/") or _DRIVE.match(clean) or ".." in parts:
        raise DocumentFailure(f"member name escapes the {what}: {name!r}")
    # A tar's names are the bytes it holds: those that are not UTF-8 are spelled \xNN.
    return "/".join(spelled(p) for p in parts if p not in ("", "."))


@dataclass
class Budget:
    """How many unpacked bytes one container may still yield (max_unpacked_mb)."""

    limit: int
    what: str
    used: int = 0
    packed: int = 0

    def take(self, data: bytes, packed: int) -> None:
        self.used += len(data)
        self.packed += packed
        self.check_size(self.used)

    def check_size(self, size: int) -> None:
        if size > self.limit:
            raise DocumentFailure(
                f"too large unpacked: the {self.what} holds more than {self.limit / MB:g} MB "
                "(max_unpacked_mb)")

    def remaining(self) -> int:
        return self.limit - self.used

    def check_ratio(self, limit: float) -> None:
        """A zip bomb: far more bytes unpacked than packed."""
        if self.used >= RATIO_FLOOR_BYTES and self.packed > 0 and self.used / self.packed > limit:
            raise DocumentFailure(
                f"compression ratio {self.used / self.packed:,.0f}:1 over the limit of {limit:g}:1 "
                f"(max_compression_ratio): the {self.what} looks like a decompression bomb")


def budget_for(inp: ReaderInput, what: str) -> Budget:
    return Budget(int(inp.params.max_unpacked_mb * MB), what)


def unique_names(members: list[Member]) -> list[Member]:
    """Members keep their names; a name given twice gets `~2`, `~3`... in archive order,
    so every member has its own path and the same one on every run."""
    seen: dict[str, int] = {}
    out = []
    for m in members:
        n = seen.get(m.name, 0) + 1
        seen[m.name] = n
        if n > 1:
            stem, dot, ext = m.name.rpartition(".")
            m = Member(f"{stem}~{n}.{ext}" if dot and "/" not in ext else f"{m.name}~{n}", m.data, m.mtime)
        out.append(m)
    return out


# --- compressed single files --------------------------------------------------------

_OPENERS = {
    "gzip": lambda f: gzip.GzipFile(fileobj=f),
    "bzip2": lambda f: bz2.BZ2File(f),
    "xz": lambda f: lzma.LZMAFile(f),
}


@dataclass
class Decompressed:
    data: bytes
    name: str  # the inner file's name: the gzip header's, else the outer name less its suffix
    notes: list[str] = field(default_factory=list)


def inner_name(source_path: str, fmt: str, data: bytes) -> str:
    name = posixpath.basename(source_path.replace("\\", "/"))
    if fmt == "gzip" and len(data) > 10 and data[3] & 0x08:  # FNAME: the original name
        end = data.find(b"\x00", 10)
        if end > 10:
            stored = data[10:end].decode("latin-1")
            stored = posixpath.basename(stored.replace("\\", "/"))
            if stored and stored not in (".", ".."):
                return stored
    stem, dot, ext = name.rpartition(".")
    if dot and ext.lower() in ("gz", "bz2", "xz"):
        return stem
    if dot and ext.lower() in ("tgz", "tbz2", "txz"):
        return stem + ".tar"
    return name


def decompress(data: bytes, fmt: str, source_path: str, max_bytes: int, max_ratio: float) -> Decompressed:
    """One compressed file's content, read with the size and ratio guards."""
    budget = Budget(max_bytes, f"{fmt} file")
    try:
        with _OPENERS[fmt](io.BytesIO(data)) as f:
            out = f.read(max_bytes + 1)
    except (OSError, EOFError, lzma.LZMAError, zlib.error, ValueError) as exc:
        raise DocumentFailure(f"unreadable {fmt} file: {type(exc).__name__}: {exc}", exc) from None
    budget.take(out, len(data))
    budget.check_ratio(max_ratio)
    if not out:
        raise DocumentFailure(f"empty {fmt} file (nothing inside)")
    return Decompressed(out, inner_name(source_path, fmt, data))
