"""Finding a document in the store from what a user types: a doc_id, a prefix, a path."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from thresher.flows.store import Store


# Shorter prefixes of a SHA-256 collide too easily to name one document.
PREFIX_MIN = 6


class NotFound(LookupError):
    """No document (or more than one) matches; the message says which and why."""


def resolve_document(store: Store, ref: str, source_roots: list[str]) -> tuple[str, list[dict[str, Any]]]:
    """A doc_id, a unique doc_id prefix (6+ hex characters) or a source path -> (doc_id, catalog rows).

    A path may be relative to the source folder, or a path to the file itself under
    one of `source_roots`; a unique path suffix also matches. The first row is the path
    the user gave (so answers name it, not another copy), else the document's live path.
    """
    catalog = store.catalog().to_pylist()
    by_doc: dict[str, list[dict[str, Any]]] = {}
    for r in catalog:
        by_doc.setdefault(r["doc_id"], []).append(r)
    ref_l = ref.lower()
    if len(ref_l) >= PREFIX_MIN and all(c in "0123456789abcdef" for c in ref_l):
        hits = [d for d in by_doc if d.startswith(ref_l)]
        if len(hits) == 1:
            return hits[0], _first(by_doc[hits[0]], None)
        if len(hits) > 1:
            raise NotFound(f"doc_id prefix {ref} matches {len(hits)} documents; give more characters")
    candidates = [ref.replace(os.sep, "/")]
    p = Path(ref)
    for root in source_roots:
        if not root:
            continue
        try:
            candidates.append(p.resolve().relative_to(Path(root).resolve()).as_posix())
        except ValueError:
            pass
    for c in candidates:
        rows = [r for r in catalog if r["source_path"] == c]
        if rows:
            row = max(rows, key=lambda r: r["present"])
            return row["doc_id"], _first(by_doc[row["doc_id"]], row["source_path"])
    suffix = [r for r in catalog if r["source_path"].endswith("/" + candidates[0])]
    if len({r["doc_id"] for r in suffix}) == 1:
        return suffix[0]["doc_id"], _first(by_doc[suffix[0]["doc_id"]], suffix[0]["source_path"])
    if ref_l and len(ref_l) < PREFIX_MIN and all(c in "0123456789abcdef" for c in ref_l):
        raise NotFound(f"no document at path {ref!r}, and a doc_id prefix needs at least {PREFIX_MIN} characters "
                       f"({ref!r} has {len(ref_l)})")
    raise NotFound(f"no document {ref!r} in the store's catalog (give a doc_id, a doc_id prefix of at least "
                   f"{PREFIX_MIN} characters, or a path relative to the source folder)")


def _first(rows: list[dict[str, Any]], asked: str | None) -> list[dict[str, Any]]:
    """The document's catalog rows, the one at `asked` first, else the live path's."""
    return sorted(rows, key=lambda r: (r["source_path"] != asked, not r["present"],
                                       r["source_path"] != r.get("canonical_path"), r["source_path"]))


def source_roots(store: Store, configured: str) -> list[str]:
    roots = [configured]
    latest = store.latest_run()
    if latest is not None and latest.manifest.get("source_root"):
        roots.append(latest.manifest["source_root"])
    return roots
