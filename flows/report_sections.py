"""The sections of the summary page, in order: each is one template under
report_templates/sections/ and one function that gives it what it shows.

To add a section: write `sections/NAME.html` (it reads `ctx`), a function
`NAME_context(ov: Overview) -> dict`, and one `Section(...)` line in SECTIONS.
Templates escape everything they print; a context holds plain values, never markup.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable

from thresher.flows.report_charts import (MAX_DOC_BARS, chart_chunk_sizes, chart_labels, chart_languages, chart_status,
                                          chart_tokens)
from thresher.flows.report_data import SEVERITY
from thresher.flows.report_overview import Overview

# Documents that need a look, shown on the summary itself; the list pages have all.
MAX_SUMMARY_ROWS = 100
ROWS_PER_LIST_PAGE = 500


@dataclass(frozen=True)
class Section:
    key: str  # its anchor on the page and in the top navigation
    title: str
    template: str
    context: Callable[[Overview], dict[str, Any]]


def when(iso: str | None) -> str:
    if not iso:
        return "-"
    try:
        t = datetime.fromisoformat(iso)
    except ValueError:
        return iso
    return t.strftime("%Y-%m-%d %H:%M:%S %Z").strip()


def seconds(s: object) -> str:
    if not isinstance(s, (int, float)):
        return "-"
    if s < 60:
        return f"{s:.1f} s"
    m, sec = divmod(int(round(s)), 60)
    return f"{m} min {sec:02d} s" if m < 60 else f"{m // 60} h {m % 60:02d} min"


def _n(v: object) -> str:
    return f"{v:,}" if isinstance(v, int) else ("-" if v is None else str(v))


def summary_context(ov: Overview) -> dict[str, Any]:
    """The base run's scan, the state the last covered run left, and what each run did."""
    scope = ov.scope
    base, last = scope.base.manifest, scope.last.manifest
    d = base.get("documents") or {}
    covered = [r.manifest for r in scope.runs]
    processed = sum((m.get("documents") or {}).get("processed") or 0 for m in covered)
    upsert = sum((m.get("changes") or {}).get("upsert") or 0 for m in covered)
    delete = sum((m.get("changes") or {}).get("delete") or 0 for m in covered)
    several = len(covered) > 1
    cards = [
        (_n(d.get("files")), "files seen"),
        (_n(len(ov.rows)), "distinct documents"),
        (_n(processed), "processed (run and reruns)" if several else "processed this run"),
        (_n(d.get("unchanged")), "unchanged (reused)"),
        (_n(d.get("removed")), "removed"),
        *([(_n(d["held"]), "held (unreadable this run, kept as stored)")] if d.get("held") else []),
        (_n(last.get("pages")), "page units"),
        (_n(last.get("chunks")), "chunks handed off"),
        (_n(last.get("tokens")), "tokens"),
        (_n(upsert), "chunks to upsert"),
        (_n(delete), "chunks to delete"),
        (_n(ov.failed_docs), "documents with a failure"),
        (_n(ov.skipped_docs), "files skipped (not documents)"),
    ]
    runs = []
    for r in scope.runs:
        m = r.manifest
        what = ""
        if m.get("kind") == "rerun":
            rd = m.get("documents") or {}
            what = f"re-ran {rd.get('processed', 0):,} of {rd.get('distinct', 0):,} live documents"
            spec = m.get("rerun") or {}
            if spec.get("step"):
                what += f" from step {spec['step']}"
        runs.append({"run_id": r.run_id, "kind": m.get("kind", "run"), "sequence": r.sequence,
                     "finished": when(m.get("finished_at")), "what": what})
    rows = [("started", when(base.get("started_at"))), ("finished", when(last.get("finished_at"))),
            ("took", seconds(sum(m.get("seconds") or 0 for m in covered)))]
    rows.append(("chain", " → ".join(s.name for s in ov.stages) or "-"))
    copies = d.get("copies") or {}
    if copies:
        rows.append(("same bytes at several paths",
                     f"{len(copies):,} document{'s' if len(copies) != 1 else ''} (noted in the documents list)"))
    failures = sum(m.get("failures") or 0 for m in covered)
    if failures:
        rows.append(("units failed in these runs" if several else "units failed this run", _n(failures)))
    if not scope.is_latest:
        rows.append(("note", "This is an older run: the documents are as that run left the store."))
    elif several:
        rows.append(("note", "The state of the store: the latest run and the reruns after it. "
                             "Figures of the scan (files seen, unchanged, removed) are the run's; the rest is "
                             "the store as the last rerun left it."))
    steps = [[s.get("name"), s.get("version"), s.get("unit"), s.get("scope"), ", ".join(s.get("formats") or []) or "all",
              ", ".join(f"{k}={v}" for k, v in (s.get("params") or {}).items()) or "defaults"]
             for s in last.get("definition", {}).get("steps") or []]
    return {
        "cards": cards, "runs": runs, "rows": rows,
        "source": base.get("source_root", "-"), "store": base.get("store_root", ov.store_root),
        "definition": last.get("definition", {}).get("name", ""), "origin": last.get("definition_origin", "-"),
        "digest": last.get("chain_digest", "-"),
        "versions": sorted((last.get("versions") or {}).items()),
        "scan_problems": base.get("scan_problems") or [],
        "steps": steps,
        "timings": [[k, seconds(v)] for k, v in (base.get("timings") or {}).items()],
    }


def charts_context(ov: Overview) -> dict[str, Any]:
    with_tokens = sorted((r for r in ov.rows if r.tokens), key=lambda r: (-r.tokens, r.path))
    largest = [(r.path, r.tokens, r.live, r.href) for r in with_tokens]
    rest = with_tokens[MAX_DOC_BARS:]
    return {"charts": [
        chart_status(ov.stages),
        chart_tokens(largest, len(ov.rows), len(rest), sum(r.tokens for r in rest), len(ov.rows) - len(with_tokens)),
        chart_languages(ov.lang_chunks, ov.lang_tokens, ov.lang_docs),
        chart_chunk_sizes(ov.chunk_sizes, ov.budget_tokens),
    ]}


def problems_context(ov: Overview) -> dict[str, Any]:
    return {"groups": ov.problem_groups()}


def list_pages(ov: Overview, href: Callable[[int], str]) -> list[dict[str, Any]]:
    """The pages of the documents list: number, link and the rows each holds."""
    out = []
    for i in range(0, max(len(ov.rows), 1), ROWS_PER_LIST_PAGE):
        chunk = ov.rows[i:i + ROWS_PER_LIST_PAGE]
        n = i // ROWS_PER_LIST_PAGE + 1
        label = f"{i + 1:,}–{i + len(chunk):,}" if chunk else "empty"
        out.append({"number": n, "href": href(n), "label": label, "rows": chunk, "first": i + 1,
                    "last": i + len(chunk)})
    return out


def documents_context(ov: Overview) -> dict[str, Any]:
    by_status = Counter(r.status for r in ov.rows)
    order = [s for s in SEVERITY if by_status.get(s)] + sorted(set(by_status) - set(SEVERITY))
    attention = [r for r in ov.rows if r.status != "ok"]
    return {"total": len(ov.rows), "by_status": [(s, by_status[s]) for s in order],
            "per_page": ROWS_PER_LIST_PAGE, "pages": ov.list_pages,
            "rows": attention[:MAX_SUMMARY_ROWS], "more": len(attention) > MAX_SUMMARY_ROWS}


def probes_and_targets(store, manifest: dict) -> tuple[list[dict], list[dict]]:
    """The run's probe rows (when it was probed) and each delivery target's state."""
    from dataclasses import asdict

    from thresher.flows.deliver import entry_states, snapshot_targets
    from thresher.flows.probes import probes_rel

    rel = store.published(probes_rel(manifest["run_id"])) if manifest.get("probes") else None
    probes = store.read_table(rel).to_pylist() if rel else []
    try:
        targets = [asdict(t) for t in entry_states(snapshot_targets(manifest), store)]
    except Exception as exc:  # noqa: BLE001 - an unreadable snapshot must not stop the report
        targets = [{"name": "-", "kind": "-", "applied": None, "behind": None, "problem": str(exc)}]
    return probes, targets


def probes_context(ov: Overview) -> dict[str, Any]:
    m = ov.scope.last.manifest.get("probes") or {}
    rows = [{"n": p["probe"], "ask": p["ask"], "expect": p["expect"],
             "rank": p["rank"] if p["rank"] is not None else "not in the first 100",
             "passed": p["passed"], "regression": p["regression"], "found": p["source_path"],
             "top": list(zip(p["top_paths"] or [], p["top_chunk_ids"] or []))}
            for p in ov.probes]
    rows.sort(key=lambda r: (not r["regression"], r["passed"], r["n"]))
    return {"summary": m, "rows": rows, "run": ov.scope.last.run_id}


def delivery_context(ov: Overview) -> dict[str, Any]:
    return {"targets": ov.targets}


def access_context(ov: Overview) -> dict[str, Any]:
    """Who may read each document, chunks by label, and documents by personal-data kind.

    Kinds and counts only: the values stay in the store (and `thresher trail`).
    """
    kinds = []
    for kind in sorted(ov.personal):
        docs = sorted(ov.personal[kind], key=lambda t: (-t[1], t[0].path))
        kinds.append({"kind": kind, "documents": len(docs), "findings": sum(n for _, n in docs),
                      "rows": docs[:MAX_SUMMARY_ROWS], "more": len(docs) > MAX_SUMMARY_ROWS})
    access = sorted(ov.access, key=lambda t: t[0].path)
    return {"chart": chart_labels(ov.label_chunks, ov.label_docs), "kinds": kinds,
            "access": access[:MAX_SUMMARY_ROWS], "more": len(access) > MAX_SUMMARY_ROWS, "total": len(access)}


SECTIONS: list[Section] = [
    Section("summary", "Summary", "sections/summary.html", summary_context),
    Section("charts", "Charts", "sections/charts.html", charts_context),
    Section("problems", "Problems", "sections/problems.html", problems_context),
    Section("documents", "Documents", "sections/documents.html", documents_context),
    Section("access", "Access and personal data", "sections/access.html", access_context),
    Section("probes", "Probes", "sections/probes.html", probes_context),
    Section("delivery", "Delivery", "sections/delivery.html", delivery_context),
]
