"""Counts read back from the store: per stage by status, pages, chunks, tokens."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from typing import Any

from thresher.flows.store import Store

STATUS_ORDER = ("ok", "failed", "dropped", "skipped")


@dataclass
class StageCounts:
    stage: str
    unit: str
    by_status: dict[str, int] = field(default_factory=dict)

    @property
    def total(self) -> int:
        return sum(self.by_status.values())


def stages_of(manifest: dict[str, Any]) -> list[tuple[str, str]]:
    """(stage name, unit kind) in chain order, as a run's manifest recorded them."""
    return [(s["name"], s["unit"]) for s in manifest["definition"]["steps"]]


def live_doc_ids(store: Store) -> list[str]:
    cat = store.catalog().to_pylist()
    return sorted({r["doc_id"] for r in cat if r["present"]})


def stage_counts(store: Store, stages: list[tuple[str, str]], doc_ids: list[str],
                 include_run: str | None = None) -> list[StageCounts]:
    out = []
    for name, unit in stages:
        t = store.current(name, unit, doc_ids, columns=["status"], include_run=include_run)
        out.append(StageCounts(name, unit, dict(Counter(t.column("status").to_pylist()))))
    return out


def format_stage_counts(counts: list[StageCounts]) -> list[str]:
    lines = []
    for c in counts:
        parts = [f"{c.by_status[s]} {s}" for s in STATUS_ORDER if c.by_status.get(s)]
        unit = "pages" if c.unit == "pages" else "chunks"
        lines.append(f"  {c.stage:<10} {c.total:>6} {unit:<6}  " + (", ".join(parts) or "none"))
    return lines
