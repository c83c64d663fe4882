"""Who may read each document: file-system facts read at scan time, and the rules.

Access is metadata, not content. The facts (owner, group, mode bits, POSIX ACL
entries) are read when the drive is scanned and kept in the catalog; the flow
definition's `access` rules are applied there too, and the hand-off joins the result
onto every chunk. Nothing here is part of a step's config digest, so a change of
access re-runs no step: it changes the catalog, the hand-off and the change set.

Readers are free strings to thresher. From the file system they are named
"user:NAME", "group:NAME" (the numeric id when the system cannot resolve it) and
"everyone" (the "other" read bit); rules name whatever the organisation's index knows.
"""

from __future__ import annotations

import grp
import os
import pwd
import stat
import struct
from dataclasses import dataclass, field
from functools import lru_cache

from thresher.flows.discover import matches

# Linux's POSIX ACL extended attribute (include/uapi/linux/posix_acl_xattr.h and
# include/uapi/linux/posix_acl.h in the kernel sources): a little-endian u32 version
# (2), then entries of (u16 tag, u16 perm, u32 id).
ACL_XATTR = "system.posix_acl_access"
ACL_XATTR_VERSION = 2
_ACL_ENTRY = struct.Struct("<HHI")
ACL_USER_OBJ, ACL_USER, ACL_GROUP_OBJ, ACL_GROUP, ACL_MASK, ACL_OTHER = 0x01, 0x02, 0x04, 0x08, 0x10, 0x20
_READ = 4

EVERYONE = "everyone"


@dataclass(frozen=True)
class AclEntry:
    tag: str  # user | group | mask | other (user/group with an empty name: the owner's)
    qualifier: int | None  # uid or gid of a named entry
    perms: int  # rwx bits, 4 = read


@dataclass(frozen=True)
class FileFacts:
    uid: int
    gid: int
    mode: int  # permission bits (st_mode & 0o7777)
    acl: tuple[AclEntry, ...] = ()
    acl_error: str = ""  # why the ACL could not be read (facts without it are still used)


@dataclass(frozen=True)
class Access:
    readers: list[str]  # sorted; [] means nobody
    label: str | None
    rule: str  # the definition key that decided: access.rules[N] or access.default
    file_readers: list[str] = field(default_factory=list)


@lru_cache(maxsize=4096)
def user_name(uid: int) -> str:
    try:
        return pwd.getpwuid(uid).pw_name
    except KeyError:
        return str(uid)


@lru_cache(maxsize=4096)
def group_name(gid: int) -> str:
    try:
        return grp.getgrgid(gid).gr_name
    except KeyError:
        return str(gid)


def parse_acl(data: bytes) -> tuple[AclEntry, ...]:
    """The entries of a system.posix_acl_access value, in stored order."""
    if len(data) < 4 or (len(data) - 4) % _ACL_ENTRY.size:
        raise ValueError(f"ACL attribute of {len(data)} bytes is not a version header plus 8-byte entries")
    (version,) = struct.unpack_from("<I", data)
    if version != ACL_XATTR_VERSION:
        raise ValueError(f"ACL attribute version {version}, expected {ACL_XATTR_VERSION}")
    names = {ACL_USER_OBJ: "user", ACL_USER: "user", ACL_GROUP_OBJ: "group", ACL_GROUP: "group",
             ACL_MASK: "mask", ACL_OTHER: "other"}
    out = []
    for tag, perm, ident in _ACL_ENTRY.iter_unpack(data[4:]):
        if tag not in names:
            raise ValueError(f"unknown ACL entry tag {tag:#x}")
        named = tag in (ACL_USER, ACL_GROUP)
        out.append(AclEntry(names[tag], ident if named else None, perm & 7))
    return tuple(out)


def read_facts(path: str, st: os.stat_result) -> FileFacts:
    """Owner, group, mode bits and ACL entries of one file (one getxattr, no process)."""
    acl: tuple[AclEntry, ...] = ()
    error = ""
    try:
        acl = parse_acl(os.getxattr(path, ACL_XATTR, follow_symlinks=True))
    except OSError as exc:
        # No attribute (ENODATA) or a file system without ACLs (ENOTSUP): the mode
        # bits say it all. Anything else is recorded, not fatal.
        if exc.errno not in (getattr(os, "ENODATA", 61), 61, 95, getattr(os, "ENOTSUP", 95)):
            error = f"cannot read ACL: {exc.strerror or exc}"
    except ValueError as exc:
        error = f"cannot read ACL: {exc}"
    return FileFacts(st.st_uid, st.st_gid, stat.S_IMODE(st.st_mode), acl, error)


def acl_text(entries: tuple[AclEntry, ...]) -> list[str]:
    """Entries in getfacl's short form ("user:bob:r--"), names resolved where possible."""
    out = []
    for e in entries:
        who = ""
        if e.qualifier is not None:
            who = user_name(e.qualifier) if e.tag == "user" else group_name(e.qualifier)
        perms = "".join(c if e.perms & bit else "-" for c, bit in (("r", 4), ("w", 2), ("x", 1)))
        out.append(f"{e.tag}:{who}:{perms}")
    return out


def file_readers(facts: FileFacts) -> list[str]:
    """Who the file system lets read the file, as reader names.

    With an ACL the mask limits named users, named groups and the owning group
    (POSIX.1e; acl(5)); the mode's group bits are then the mask.
    """
    mode = facts.mode
    readers = set()
    if mode & stat.S_IRUSR:
        readers.add(f"user:{user_name(facts.uid)}")
    if mode & stat.S_IROTH:
        readers.add(EVERYONE)
    if not facts.acl:
        if mode & stat.S_IRGRP:
            readers.add(f"group:{group_name(facts.gid)}")
        return sorted(readers)
    mask = next((e.perms for e in facts.acl if e.tag == "mask"), 7)
    for e in facts.acl:
        if e.tag == "group" and e.qualifier is None and e.perms & mask & _READ:
            readers.add(f"group:{group_name(facts.gid)}")
        elif e.tag == "user" and e.qualifier is not None and e.perms & mask & _READ:
            readers.add(f"user:{user_name(e.qualifier)}")
        elif e.tag == "group" and e.qualifier is not None and e.perms & mask & _READ:
            readers.add(f"group:{group_name(e.qualifier)}")
    return sorted(readers)


def decide(section, source_path: str, facts: FileFacts | None) -> Access:
    """The first rule whose paths match gives readers and label; else the default.

    A rule or default that allows nobody ([]) wins over the file system: the
    document fails closed whatever its mode bits say.
    """
    fs = file_readers(facts) if facts is not None and section.file_system == "combine" else []
    for i, rule in enumerate(section.rules):
        if matches(source_path, rule.paths):
            readers, label, key = list(rule.readers), rule.label, f"access.rules[{i}]"
            break
    else:
        readers, label, key = list(section.default.readers), section.default.label, "access.default"
    if readers:
        readers = sorted(set(readers) | set(fs))
    return Access(readers, label, key, fs)


def catalog_columns(section, source_path: str, facts: FileFacts | None) -> dict:
    """The catalog's access columns for one path."""
    a = decide(section, source_path, facts)
    return {
        "owner_uid": facts.uid if facts else None, "owner": user_name(facts.uid) if facts else None,
        "group_gid": facts.gid if facts else None, "group": group_name(facts.gid) if facts else None,
        "mode": facts.mode if facts else None, "acl": acl_text(facts.acl) if facts else [],
        "readers": a.readers, "label": a.label, "access_rule": a.rule,
    }


def document_access(catalog_rows: list[dict], section) -> dict[str, tuple[list[str], str | None, str]]:
    """Per live document: (readers, label, rule) over its present paths.

    A row catalogued before access was recorded gets the rules' answer without facts.

    Anyone who may open one copy may read the bytes, so readers are the union over
    copies; but one copy that fails closed withholds the document (fail closed wins).
    The label and rule are the canonical path's.
    """
    if section is None:
        from thresher.flows.config import AccessSection

        section = AccessSection()
    out: dict[str, tuple[list[str], str | None, str]] = {}
    closed: set[str] = set()
    paths: dict[str, list[dict]] = {}
    for r in catalog_rows:
        if r.get("present"):
            if r.get("access_rule") is None:
                a = decide(section, r["source_path"], None)
                r = {**r, "readers": a.readers, "label": a.label, "access_rule": a.rule}
            paths.setdefault(r["doc_id"], []).append(r)
    for d, rows in paths.items():
        rows.sort(key=lambda r: r["source_path"])
        canon = next((r for r in rows if r["source_path"] == r.get("canonical_path")), rows[0])
        if any(not r["readers"] for r in rows):
            closed.add(d)
        readers = sorted({x for r in rows for x in r["readers"]})
        rule = canon["access_rule"]
        if d in closed:
            readers = []
            rule = next(r["access_rule"] for r in rows if not r["readers"])
        out[d] = (readers, canon.get("label"), rule)
    return out


ACCESS_COLUMNS = ("owner_uid", "owner", "group_gid", "group", "mode", "acl", "readers", "label", "access_rule")


def inherit_container_access(rows: list[dict]) -> None:
    """A document inside another (archive member, attachment) takes its container's
    access columns, through any depth of nesting (in place, present rows only)."""
    drive = {}
    for r in rows:
        if r.get("present") and not r.get("container_doc_id"):
            drive.setdefault(r["doc_id"], r)
    members = {}
    for r in rows:
        if r.get("present") and r.get("container_doc_id"):
            members.setdefault(r["doc_id"], r)

    def holder(doc_id: str, depth: int = 0) -> dict | None:
        if doc_id in drive or depth > 32:
            return drive.get(doc_id)
        m = members.get(doc_id)
        return None if m is None else holder(m["container_doc_id"], depth + 1)

    for r in rows:
        if r.get("present") and r.get("container_doc_id"):
            top = holder(r["container_doc_id"])
            if top is not None:
                r.update({k: top.get(k) for k in ACCESS_COLUMNS})
