"""Counts read back from the store: per stage by status, pages, chunks, tokens."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from thresher.flows import schema
from thresher.flows.arrow_groups import count_and_sum_per_key
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
    return counts_by_stage_and_document(store, stages, doc_ids, include_run)[0]


def counts_by_stage_and_document(store: Store, stages: list[tuple[str, str]], doc_ids: list[str],
                                 include_run: str | None = None
                                 ) -> tuple[list[StageCounts], dict[str, Counter], Counter]:
    """Per stage the units by status; per document its units by status over all stages,
    and its units at the first stage (its pages). One read of each stage."""
    rows = _count_rows(store, stages, doc_ids, include_run)
    return _fold(stages, pa.Table.from_pylist(rows, schema=schema.STAGE_COUNTS))


def _count_rows(store: Store, stages: list[tuple[str, str]], doc_ids: list[str],
                include_run: str | None) -> list[dict[str, Any]]:
    """Current units per (document, stage, status): rows of schema.STAGE_COUNTS."""
    rows: list[dict[str, Any]] = []
    for name, unit in stages:
        t = store.current(name, unit, doc_ids, columns=["doc_id", "status"], include_run=include_run)
        per = Counter(zip(t.column("doc_id").to_pylist(), t.column("status").to_pylist()))
        rows += [{"doc_id": d, "stage": name, "status": st, "units": n} for (d, st), n in per.items()]
    return rows


def counts_rel(run_id: str) -> str:
    return f"runs/{run_id}/counts.parquet"


def carried_counts(store: Store, stages: list[tuple[str, str]], live_docs: list[str], run_id: str,
                   previous: Any = None) -> tuple[list[StageCounts], dict[str, Counter], Counter, Any]:
    """counts_by_stage_and_document for a running run, from the latest committed run's
    counts where they still hold.

    A document's current units at a stage change only when a run writes rows of it
    there (every write is in the run's ledger), so the previous run's per-document
    counts stand, stage by stage, for every live document this run wrote no row of at
    that stage. The others (written there this run, or live now and not counted then)
    are counted afresh at that stage.
    Without a usable previous record (none, other stages, a file that does not match
    its manifest's checksum) every stage is counted in full. Returns the counts by
    stage; units by status and pages of the documents counted afresh (the ones this
    run changed: a quiet week on a large drive sums none); and this run's per-document
    table (schema.STAGE_COUNTS), to be stored for the next run.
    """
    live = set(live_docs)
    prev = _previous_counts(store, stages, previous)
    parts: list[pa.Table] = []
    if prev is None:
        recount = {name: live for name, _ in stages}
    else:
        counted = set(pc.unique(prev.column("doc_id")).to_pylist())
        # Per stage: a document's counts there change only where this run wrote its rows
        # (a week's dedup revisions touch that stage alone: on a documentation drive, 35
        # edited files and 194 documents revised at dedup, counted afresh at every stage
        # before).
        recount = {name: live & (store.run_docs(name, run_id) | (live - counted)) for name, _ in stages}
        # The carried rows stay Arrow: a quiet week on a large drive turns none of them
        # into Python objects but the per-document sums the summary table shows.
        for name, _ in stages:
            carried = pa.array(sorted(live - recount[name]), pa.string())
            parts.append(prev.filter(pc.and_(pc.equal(prev.column("stage"), name),
                                             pc.is_in(prev.column("doc_id"), value_set=carried))))
    rows = [r for name, unit in stages if recount[name]
            for r in _count_rows(store, [(name, unit)], sorted(recount[name]), run_id)]
    if rows:
        parts.append(pa.Table.from_pylist(rows, schema=schema.STAGE_COUNTS))
    table = pa.concat_tables(parts).cast(schema.STAGE_COUNTS) if parts else schema.STAGE_COUNTS.empty_table()
    table = table.sort_by([("doc_id", "ascending"), ("stage", "ascending"), ("status", "ascending")])
    touched = set().union(*recount.values()) if recount else set()
    return (*_fold(stages, table, touched), table)


def _fold(stages: list[tuple[str, str]], t: pa.Table, docs: set[str] | None = None
          ) -> tuple[list[StageCounts], dict[str, Counter], Counter]:
    """Per stage by status, per document by status, pages per document, from a
    STAGE_COUNTS table (summed per key in Arrow: arrow_groups). `docs`: the documents
    to give per-document figures for (None: all)."""
    sep = "\x1f"  # a control character: in no doc_id, stage or status name
    units = t.column("units")
    totals = {name: Counter() for name, _ in stages}
    for key, _, n in count_and_sum_per_key(pc.binary_join_element_wise(t.column("stage"), t.column("status"), sep),
                                           units):
        stage, status = key.split(sep)
        totals[stage][status] += n
    if docs is not None:
        t = t.filter(pc.is_in(t.column("doc_id"), value_set=pa.array(sorted(docs), pa.string())))
        units = t.column("units")
    by_doc: dict[str, Counter] = {}
    for key, _, n in count_and_sum_per_key(pc.binary_join_element_wise(t.column("doc_id"), t.column("status"), sep),
                                           units):
        doc, status = key.split(sep)
        by_doc.setdefault(doc, Counter())[status] += n
    pages: Counter = Counter()
    if stages:
        first = t.filter(pc.equal(t.column("stage"), stages[0][0]))
        for d, _, n in count_and_sum_per_key(first.column("doc_id"), first.column("units")):
            pages[d] = n
    out = [StageCounts(name, unit, {k: totals[name][k] for k in sorted(totals[name])}) for name, unit in stages]
    return out, by_doc, pages


def _previous_counts(store: Store, stages: list[tuple[str, str]], previous: Any):
    """The previous run's per-document counts, if they can stand for this run's: read
    once, and used only when those bytes match the manifest's record of the file."""
    if previous is None:
        return None
    manifest = previous.manifest
    rel = counts_rel(previous.run_id)
    record = (manifest.get("files") or {}).get(rel)
    if record is None or stages_of(manifest) != stages:
        return None
    try:
        table, found = store.table_and_record(rel)
    except (OSError, pa.ArrowInvalid):
        return None
    return table if found == record else None


# Rows of a run's per-document artifact at most: Prefect keeps every run's artifacts
# in its database, and its UI pages through them; the report has every document.
ARTIFACT_ROWS = 1000


def document_rows(live: dict[str, tuple[int, str, int]], by_doc: dict[str, Counter], pages: Counter,
                  handoff_docs: dict[str, tuple[int, int]], removed: dict[str, str | None] | None = None
                  ) -> list[dict[str, Any]]:
    """One row per document of `by_doc` that is live, and per removed doc_id (-> its
    last path) whose path is not live now (an edited file is its new version's row):
    pages, chunks, tokens, failed and dropped units; failed first, then in path order."""
    rows = []
    for d, c in by_doc.items():
        if d not in live:
            continue
        chunks, tokens = handoff_docs.get(d, (0, 0))
        rows.append({"document": live[d][1], "pages": pages[d], "chunks": chunks, "tokens": tokens,
                     "failed units": c["failed"], "dropped units": c["dropped"],
                     "status": "failed" if c["failed"] else ("ok" if chunks else
                                                             "skipped" if c["skipped"] else "no chunks")})
    paths = {path for _, path, _ in live.values()}
    for d, path in (removed or {}).items():
        if path in paths:
            continue
        rows.append({"document": path or d, "pages": 0, "chunks": 0, "tokens": 0, "failed units": 0,
                     "dropped units": 0, "status": "removed"})
    rows.sort(key=lambda r: (r["status"] != "failed", r["document"]))
    return rows


@dataclass
class TokenTotals:
    encoding: str
    total: int
    chunks: int
    documents: int
    by_language: dict[str, int]
    by_folder: dict[str, int]  # top-level folder of the source path ("." for the root)


def token_totals(store: Store) -> TokenTotals | None:
    """Tokens in the hand-off, in its primary encoding, by language and by folder."""
    table = store.handoff()
    if table is None:
        return None
    cols = table.select(["doc_id", "source_path", "language", "token_count", "encoding"]).to_pylist()
    by_lang: Counter = Counter()
    by_folder: Counter = Counter()
    for r in cols:
        n = r["token_count"] or 0
        by_lang[r["language"] or "unknown"] += n
        folder = r["source_path"].split("/", 1)[0] if "/" in r["source_path"] else "."
        by_folder[folder] += n
    encoding = cols[0]["encoding"] if cols else ""
    return TokenTotals(encoding or "", sum(by_lang.values()), len(cols), len({r["doc_id"] for r in cols}),
                       dict(by_lang.most_common()), dict(by_folder.most_common()))


def format_stage_counts(counts: list[StageCounts]) -> list[str]:
    lines = []
    for c in counts:
        parts = [f"{c.by_status[s]} {s}" for s in STATUS_ORDER if c.by_status.get(s)]
        unit = "pages" if c.unit == "pages" else "chunks"
        lines.append(f"  {c.stage:<10} {c.total:>6} {unit:<6}  " + (", ".join(parts) or "none"))
    return lines


def chunks_by_label(store: Store) -> dict[str, int]:
    """Hand-off chunks per access label ("(no label)" for none), most first."""
    table = store.handoff()
    if table is None or "label" not in table.column_names:
        return {}
    return dict(Counter(label or "(no label)" for label in table.column("label").to_pylist()).most_common())


@dataclass
class Judgements:
    """The content judgements of the page steps, counted over the current view: each is
    a column of a stage table (extract: navigation, layer_problem, control_bytes;
    language: unvoted_blocks), so a reviewer can find the units and overrule the rule."""

    navigation_pages: dict[str, int] = field(default_factory=dict)  # kind -> pages
    navigation_dropped: int = 0
    layer_pages: int = 0
    layer_ocr: int = 0
    layer_failed: int = 0
    control_bytes: int = 0
    control_files: int = 0
    unvoted_blocks: int = 0
    unvoted_pages: int = 0


def judgements(store: Store, stages: list[tuple[str, str]], doc_ids: list[str]) -> Judgements:
    j = Judgements()
    names = {name for name, _ in stages}
    if "extract" in names:
        t = store.current("extract", "pages", doc_ids,
                          columns=["status", "method", "navigation", "layer_problem", "control_bytes"]).to_pylist()
        nav: Counter = Counter()
        for r in t:
            if r["navigation"]:
                nav[r["navigation"]] += 1
                j.navigation_dropped += r["status"] == "dropped"
            if r["layer_problem"]:
                j.layer_pages += 1
                j.layer_ocr += r["method"] == "ocr"
                j.layer_failed += r["status"] == "failed"
            if r["control_bytes"]:
                j.control_bytes += r["control_bytes"]
                j.control_files += 1
        j.navigation_pages = dict(sorted(nav.items()))
    if "language" in names:
        for n in store.current("language", "pages", doc_ids, columns=["unvoted_blocks"]).column(
                "unvoted_blocks").to_pylist():
            if n:
                j.unvoted_blocks += n
                j.unvoted_pages += 1
    return j


def format_judgements(j: Judgements) -> list[str]:
    kinds = ", ".join(f"{k} {n}" for k, n in j.navigation_pages.items())
    nav = sum(j.navigation_pages.values())
    return [
        f"  navigation pages        {nav}" + (f" ({kinds}), {j.navigation_dropped} dropped" if nav else ""),
        f"  unreadable text layers  {j.layer_pages} page(s)"
        + (f": {j.layer_ocr} read by OCR, {j.layer_failed} failed" if j.layer_pages else ""),
        f"  stray control bytes     {j.control_bytes} removed from {j.control_files} file(s)",
        f"  language not voted      {j.unvoted_blocks} block(s) of commands, paths, numbers on "
        f"{j.unvoted_pages} page(s)",
    ]
