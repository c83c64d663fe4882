"""Failed and dropped units of the live documents, grouped by what went wrong."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

from thresher.flows.store import Store
from thresher.flows.summary import live_doc_ids, stages_of

# Parts of a reason that differ from unit to unit but not in kind: ids, paths, numbers.
_VARIABLE = [
    (re.compile(r"\b[0-9a-f]{12,64}\b"), "<id>"),
    (re.compile(r"(?<![\w<])[\w.-]+(?:/[\w.-]+)+"), "<path>"),
    (re.compile(r"'[^']*'"), "'…'"),
    (re.compile(r"\d+(?:\.\d+)?"), "N"),
]


def reason_kind(reason: str) -> str:
    """A reason with its unit-specific parts masked, so like failures group together."""
    out = reason or "(no reason given)"
    for pattern, mask in _VARIABLE:
        out = pattern.sub(mask, out)
    return out


@dataclass
class FailureGroup:
    stage: str
    status: str
    kind: str
    units: list[dict[str, Any]] = field(default_factory=list)

    @property
    def documents(self) -> list[str]:
        return sorted({u["source_path"] for u in self.units})


def failure_groups(store: Store, statuses: tuple[str, ...] = ("failed", "dropped")) -> list[FailureGroup]:
    latest = store.latest_run()
    if latest is None:
        return []
    docs = live_doc_ids(store)
    canonical = {r["doc_id"]: r["canonical_path"] or r["source_path"]
                 for r in store.catalog().to_pylist() if r["present"]}
    groups: dict[tuple[str, str, str], FailureGroup] = {}
    order = {name: i for i, (name, _) in enumerate(stages_of(latest.manifest))}
    for name, unit in stages_of(latest.manifest):
        cols = ["doc_id", "locator", "page", "status", "reason", "error_type", "run_id"]
        t = store.current(name, unit, docs, columns=cols)
        for row in t.to_pylist():
            if row["status"] not in statuses:
                continue
            key = (name, row["status"], reason_kind(row["reason"] or ""))
            g = groups.setdefault(key, FailureGroup(name, row["status"], key[2]))
            row["source_path"] = canonical.get(row["doc_id"], row["doc_id"])
            g.units.append(row)
    out = list(groups.values())
    for g in out:
        g.units.sort(key=lambda u: (u["source_path"], u["page"] or 0, u["locator"]))
    out.sort(key=lambda g: (g.status != "failed", order.get(g.stage, 99), -len(g.units), g.kind))
    return out
