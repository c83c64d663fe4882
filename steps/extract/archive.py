"""Archives (.zip, .tar; a .tar.gz arrives here already decompressed by the step):
every member is a document of its own, handed back to the flows layer by its name.

The archive itself gives no pages: its one unit is `skipped` with a reason that
counts its members. Guards, each with its own reason (unpack.py): nesting depth,
member count, unpacked size, compression ratio, names that escape the archive.
Encrypted members and links are left out and listed in the unit's `removed`.
"""

from __future__ import annotations

import calendar
import io
import tarfile
import zipfile

from ..units import Member
from .blocks import DocumentFailure, ReaderInput, ReadResult
from .unpack import budget_for, check_count, check_nesting, safe_member_name, unique_names


def _result(fmt: str, what: str, members: list[Member], removed: list[dict]) -> ReadResult:
    members = unique_names(sorted(members, key=lambda m: m.name))
    note = f"{what}: {len(members)} member(s), each read as a document of its own"
    if removed:
        note += f"; {len(removed)} left out (see removed)"
    return ReadResult(format=fmt, method="archive", pages=[], members=members, skipped=note,
                      removed=removed)


def read_zip(inp: ReaderInput) -> ReadResult:
    check_nesting(inp, "zip archive")
    try:
        archive = zipfile.ZipFile(io.BytesIO(inp.data))
    except (zipfile.BadZipFile, OSError, EOFError, ValueError) as exc:
        raise DocumentFailure(f"unreadable zip archive: {exc}", exc) from None
    with archive:
        infos = [i for i in archive.infolist() if not i.is_dir()]
        check_count(len(infos), inp.params.max_members, "zip archive")
        budget = budget_for(inp, "zip archive")
        # Declared sizes first: a bomb is refused before anything is inflated.
        budget.packed = sum(i.compress_size for i in infos)
        budget.used = sum(i.file_size for i in infos)
        budget.check_size(budget.used)
        budget.check_ratio(inp.params.max_compression_ratio)
        budget.used = budget.packed = 0
        members, removed = [], []
        for info in infos:
            name = safe_member_name(info.filename, "zip archive")
            if not name:
                continue
            if info.flag_bits & 0x1:  # the encryption bit (PKWARE APPNOTE 4.4.4)
                removed.append({"kind": "member", "text": name, "reason": "password protected"})
                continue
            try:
                with archive.open(info) as f:
                    data = f.read(budget.remaining() + 1)
            except (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError) as exc:
                removed.append({"kind": "member", "text": name,
                                "reason": f"unreadable member: {type(exc).__name__}: {exc}"})
                continue
            budget.take(data, info.compress_size)
            budget.check_ratio(inp.params.max_compression_ratio)
            # Zip times carry no time zone; read as UTC so every run names the same instant.
            mtime = float(calendar.timegm(info.date_time + (0, 0, 0)))
            members.append(Member(name, data, mtime))
    return _result("zip", "zip archive", members, removed)


def read_tar(inp: ReaderInput) -> ReadResult:
    check_nesting(inp, "tar archive")
    try:
        archive = tarfile.open(fileobj=io.BytesIO(inp.data), mode="r:")
    except (tarfile.TarError, OSError, EOFError, ValueError) as exc:
        raise DocumentFailure(f"unreadable tar archive: {exc}", exc) from None
    budget = budget_for(inp, "tar archive")
    members, removed = [], []
    count = 0
    with archive:
        try:
            for info in archive:  # streamed: the member count is checked as it grows
                if info.isdir():
                    continue
                count += 1
                check_count(count, inp.params.max_members, "tar archive")
                name = safe_member_name(info.name, "tar archive")
                if not name:
                    continue
                if not info.isfile():
                    kind = "link" if info.issym() or info.islnk() else "special file"
                    removed.append({"kind": "member", "text": name, "reason": f"{kind}, not a document"})
                    continue
                budget.check_size(budget.used + info.size)
                f = archive.extractfile(info)
                data = f.read(info.size) if f is not None else b""
                budget.take(data, 0)
                members.append(Member(name, data, float(info.mtime)))
        except (tarfile.TarError, OSError, EOFError) as exc:
            raise DocumentFailure(f"unreadable tar archive: {type(exc).__name__}: {exc}", exc) from None
    return _result("tar", "tar archive", members, removed)
