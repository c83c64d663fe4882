"""What the review page shows, gathered from the store (no HTML here).

Everything is read generically: the stages come from the run's manifest in chain
order, a stage's own columns from its table's schema, so a stage added to or dropped
from the flow definition, or a new payload column, shows up without a change here.
Page units are matched across page stages by locator, chunks across chunk stages by
chunk_id.
"""

from __future__ import annotations

import json
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import pyarrow.dataset as ds

from thresher.flows import schema
from thresher.flows.access import document_access
from thresher.flows.config import AccessSection
from thresher.flows.store import RunInfo, Store

# Worst first: a document's status is its worst unit's.
SEVERITY = ("failed", "dropped", "skipped", "ok")
COMMON_NAMES = frozenset(f.name for f in schema.COMMON)
PAGE_NAMES = frozenset(f.name for f in schema.PAGE_COLUMNS)
CHUNK_NAMES = frozenset(f.name for f in schema.CHUNK_COLUMNS)
# A list of numbers longer than this (MinHash signatures, band keys) is summarised.
MAX_LISTED_NUMBERS = 8
MAX_FACT_CHARS = 240


class ReportError(RuntimeError):
    """The report cannot be made as asked; the message is one line saying why."""


def worst(statuses) -> str | None:
    seen = set(statuses)
    for s in SEVERITY:
        if s in seen:
            return s
    return next(iter(sorted(seen)), None)


@dataclass
class StageInfo:
    name: str
    unit: str  # "pages" | "chunks"
    version: str = ""
    scope: str = ""
    formats: list[str] = field(default_factory=list)
    params: dict[str, Any] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)  # current view of live documents

    @property
    def total(self) -> int:
        return sum(self.counts.values())


@dataclass
class UnitAtStage:
    """One unit (page or chunk) as one stage left it."""

    stage: str
    status: str
    reason: str = ""
    error_type: str = ""
    traceback: str = ""
    warnings: list[str] = field(default_factory=list)
    facts: list[tuple[str, str]] = field(default_factory=list)  # the stage's own columns, formatted
    text: str | None = None
    run_id: str = ""
    attempt: int = 1
    removed: list[dict[str, Any]] = field(default_factory=list)  # lines a stage took out, and why
    judged: list[str] = field(default_factory=list)  # JUDGEMENTS that hold for an ok unit

    @property
    def removed_kinds(self) -> str:
        counts = Counter(r.get("kind") or "line" for r in self.removed)
        return ", ".join(f"{k} {n}" for k, n in sorted(counts.items()))

    @property
    def traceback_pane(self):
        from thresher.flows.report_diff import single
        return single(self.traceback)


@dataclass
class PageView:
    locator: str
    page: int | None
    stages: list[UnitAtStage]
    language: str | None = None
    language_prob: float | None = None

    @property
    def label(self) -> str:
        if self.page is not None:
            return f"page {self.page}"
        return {"file": "whole file", "document": "whole document"}.get(self.locator, self.locator)

    @property
    def status(self) -> str:
        return worst(u.status for u in self.stages) or "ok"

    def texts(self) -> tuple[UnitAtStage | None, UnitAtStage | None, list[str]]:
        """(first stage with text, last stage with text, stages that changed the text)."""
        with_text = [u for u in self.stages if u.text is not None and (u.status == "ok" or u.text)]
        if not with_text:
            return None, None, []
        changed = [b.stage for a, b in zip(with_text, with_text[1:]) if a.text != b.text]
        return with_text[0], with_text[-1], changed


@dataclass
class ChunkView:
    chunk_id: str
    index: int
    heading_path: list[str]
    page_start: int | None
    page_end: int | None
    tokens: int | None
    language: str | None
    text: str
    stages: list[UnitAtStage]
    live: bool = False
    duplicate_of: str | None = None
    similarity: float | None = None
    duplicate_kind: str | None = None
    personal: dict[str, int] = field(default_factory=dict)  # personal-data kind -> findings (never values)

    @property
    def status(self) -> str:
        return worst(u.status for u in self.stages) or "ok"

    @property
    def reason(self) -> str:
        for want in SEVERITY[:-1]:
            for u in self.stages:
                if u.status == want and u.reason:
                    return f"{u.stage}: {u.reason}"
        return ""

    @property
    def pages(self) -> str:
        if self.page_start is None:
            return ""
        if self.page_end in (None, self.page_start):
            return f"p. {self.page_start}"
        return f"pp. {self.page_start}-{self.page_end}"


@dataclass
class DocumentView:
    doc_id: str
    path: str
    other_paths: list[str]
    size: int | None
    first_run: str | None
    last_run: str | None
    format: str = ""
    title: str = ""
    language: str | None = None
    pages: list[PageView] = field(default_factory=list)
    chunks: list[ChunkView] = field(default_factory=list)
    by_stage: dict[str, dict[str, int]] = field(default_factory=dict)
    passed_by: list[str] = field(default_factory=list)  # format-limited stages that did not apply
    status: str = "ok"
    first_problem: str = ""  # "stage: reason" of the first failed (else dropped) unit
    anchor: str = ""
    # A document inside a document: (container doc_id, container path, name inside it).
    container: tuple[str, str, str] | None = None
    holds: list[tuple[str, str]] = field(default_factory=list)  # (doc_id, path) of documents inside it
    # Access as the catalog holds it (flows/access.py); None when the catalog predates it.
    readers: list[str] | None = None
    label: str | None = None
    access_rule: str | None = None

    @property
    def personal(self) -> dict[str, int]:
        """Personal-data findings per kind over all its chunks (dropped ones too)."""
        out: dict[str, int] = {}
        for c in self.chunks:
            for k, n in c.personal.items():
                out[k] = out.get(k, 0) + n
        return dict(sorted(out.items()))

    @property
    def page_count(self) -> int:
        return sum(1 for p in self.pages if p.locator != "document")

    @property
    def live_chunks(self) -> list[ChunkView]:
        return [c for c in self.chunks if c.live]

    @property
    def tokens(self) -> int:
        return sum(c.tokens or 0 for c in self.live_chunks)


# --------------------------------------------------------------------------- formatting facts

def format_value(value: Any) -> str | None:
    """A stage's own column value as short text, or None when there is nothing to say."""
    # Zero, false and empty say nothing a reviewer needs (as in `thresher trail`).
    if value is None or value is False or value == "" or value == [] or value == {}:
        return None
    if isinstance(value, (int, float)) and not isinstance(value, bool) and value == 0:
        return None
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.3g}"
    if isinstance(value, datetime):
        return value.isoformat(timespec="seconds")
    if isinstance(value, bytes):
        return f"{len(value)} bytes"
    if isinstance(value, dict):
        value = list(value.items())
    if isinstance(value, list):
        if all(isinstance(v, tuple) and len(v) == 2 for v in value):  # a map column
            text = ", ".join(f"{k} {format_value(v) or '-'}" for k, v in value)
        elif all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            if len(value) > MAX_LISTED_NUMBERS:
                return f"{len(value)} values"
            text = ", ".join(format_value(v) or "0" for v in value)
        else:
            text = "; ".join(format_value(v) or "-" for v in value)
    elif isinstance(value, (int, str)):
        text = str(value)
    else:
        text = json.dumps(value, default=str, sort_keys=True)
    return text if len(text) <= MAX_FACT_CHARS else text[: MAX_FACT_CHARS - 1] + "…"


def own_columns(names: list[str], unit: str) -> list[str]:
    """A stage table's columns that are neither common nor the unit's own."""
    unit_names = PAGE_NAMES if unit == "pages" else CHUNK_NAMES
    return [n for n in names if n not in COMMON_NAMES and n not in unit_names]


# A warning that only repeats, one by one, the lines the `removed` column lists.
_REMOVAL_WARNING = "dropped running header/footer:"


def _unit_at(stage: str, row: dict[str, Any], own: list[str]) -> UnitAtStage:
    facts = []
    removed = []
    for name in own:
        if name in schema.MACHINE_COLUMNS:
            continue
        value = row.get(name)
        if name == "removed" and isinstance(value, list):
            removed = [r for r in value if isinstance(r, dict)]
            continue
        text = format_value(value)
        if text is not None:
            facts.append((name, text))
    warnings = list(row.get("warnings") or [])
    if removed:  # one folded line per page with a count instead (the list is behind a disclosure)
        warnings = [w for w in warnings if not w.startswith(_REMOVAL_WARNING)]
    return UnitAtStage(
        stage=stage, status=row.get("status") or "ok", reason=row.get("reason") or "",
        error_type=row.get("error_type") or "", traceback=row.get("traceback") or "",
        warnings=warnings, facts=facts, text=row.get("text"),
        run_id=row.get("run_id") or "", attempt=row.get("attempt") or 1, removed=removed,
        judged=[what for col, what in JUDGEMENTS.items() if row.get(col)] if row.get("status") == "ok" else [],
    )


# --------------------------------------------------------------------------- reading the store

class _StoreAsOf(Store):
    """The store as it was when a given run committed: later runs are invisible."""

    def __init__(self, root: str, sequence: int):
        super().__init__(root)
        self._as_of = sequence

    def runs(self, refresh: bool = False) -> list[RunInfo]:
        return [r for r in super().runs(refresh) if r.sequence <= self._as_of]


@dataclass
class Scope:
    """The runs a report covers, oldest first: a run and the reruns that followed it.

    By default the state of the store: the latest full run plus every rerun after it
    (a rerun alone saw no files, so its own figures would say "0 files seen"). With
    --run, that one run as it left the store.
    """

    runs: list[RunInfo]
    is_latest: bool

    @property
    def base(self) -> RunInfo:
        return self.runs[0]

    @property
    def last(self) -> RunInfo:
        return self.runs[-1]

    @property
    def reruns(self) -> list[RunInfo]:
        return self.runs[1:]

    @property
    def label(self) -> str:
        n = len(self.reruns)
        return self.base.run_id + (f" + {n} rerun{'s' if n != 1 else ''}" if n else "")


def pick_scope(store: Store, run_id: str | None) -> Scope:
    runs = store.runs(refresh=True)
    if not runs:
        raise ReportError(f"no committed run in store {store.root}; run `thresher run` first")
    if run_id is None:
        start = len(runs) - 1
        while start > 0 and runs[start].manifest.get("kind") == "rerun":
            start -= 1
        return Scope(runs[start:], True)
    for r in runs:
        if r.run_id == run_id:
            return Scope([r], r is runs[-1])
    raise ReportError(f"no committed run {run_id!r} in store {store.root} "
                      f"(latest is {runs[-1].run_id})")


def _live_catalog(store: Store, run: RunInfo, is_latest: bool) -> dict[str, list[dict[str, Any]]]:
    """doc_id -> its catalog rows (every path holding those bytes) live at `run`.

    The catalog is rewritten by every run, so for an older run a path counts as live
    when it was first seen at or before that run and was still seen at or after it.
    """
    seq = {r.run_id: r.sequence for r in store.runs()}
    by_doc: dict[str, list[dict[str, Any]]] = {}
    for row in store.catalog().to_pylist():
        if is_latest:
            live = bool(row.get("present"))
        else:
            first = seq.get(row.get("first_run") or "", 10**9)
            last = seq.get(row.get("last_run") or "", 0)
            live = first <= run.sequence and (last >= run.sequence or bool(row.get("present")))
        if live:
            by_doc.setdefault(row["doc_id"], []).append(row)
    for rows in by_doc.values():
        rows.sort(key=lambda r: r["source_path"])
    return by_doc


def _stage_infos(manifest: dict[str, Any]) -> list[StageInfo]:
    out = []
    for s in manifest.get("definition", {}).get("steps", []):
        out.append(StageInfo(name=s["name"], unit=s.get("unit", "pages"), version=str(s.get("version", "")),
                             scope=s.get("scope", ""), formats=list(s.get("formats") or []),
                             params=dict(s.get("params") or {})))
    return out


def _canonical_path(rows: list[dict[str, Any]]) -> str:
    canon = {r.get("canonical_path") for r in rows} - {None, ""}
    paths = [r["source_path"] for r in rows]
    for c in sorted(canon):
        if c in paths:
            return c
    return paths[0]


# What the summary needs of each unit; the text, tracebacks and a stage's own columns
# are read only for the document pages being written.
# Content judgements on units left ok (summary.Judgements counts the same columns): the
# summary's problem list names them, so a reviewer can find and overrule them.
JUDGEMENTS = {
    "control_bytes": "stray control bytes removed from the text",
    "layer_problem": "text layer unreadable: read by OCR instead",
    "unvoted_blocks": "blocks of commands, paths or numbers left out of the language vote",
}
JUDGEMENT_COLUMNS = tuple(JUDGEMENTS)
LIGHT_COLUMNS = ("doc_id", "unit_id", "locator", "page", "status", "reason", "error_type", "format", "title",
                 "language", "doc_language", "chunk_id", "chunk_index", "token_count", "heading_path",
                 "page_start", "page_end", "duplicate_of", "duplicate_kind", "similarity", "run_id", "attempt",
                 "personal_counts", *JUDGEMENT_COLUMNS)


@dataclass
class StoreView:
    """One report's reading of the store: its scope, the live catalog and the stages."""

    store: Store
    scope: Scope
    view: Store
    catalog: dict[str, list[dict[str, Any]]]
    stages: list[StageInfo]
    _held: dict[str, list[tuple[str, str]]] | None = field(default=None, repr=False)

    @property
    def doc_ids(self) -> list[str]:
        return sorted(self.catalog)

    def held_by(self) -> dict[str, list[tuple[str, str]]]:
        """container doc_id -> (doc_id, path) of the live documents found inside it."""
        if self._held is None:
            self._held = {}
            for d, rows in self.catalog.items():
                for r in rows:
                    if r.get("container_doc_id"):
                        self._held.setdefault(r["container_doc_id"], []).append((d, r["source_path"]))
            for v in self._held.values():
                v.sort(key=lambda t: t[1])
        return self._held


def _container_of(sv: "StoreView", rows: list[dict[str, Any]]) -> tuple[str, str, str] | None:
    """The container of a document found inside another (its first such path), if live."""
    for r in sorted(rows, key=lambda r: r["source_path"]):
        cid = r.get("container_doc_id")
        if cid and cid in sv.catalog:
            return cid, _canonical_path(sv.catalog[cid]), r.get("member_name") or ""
    return None


def open_view(store: Store, run_id: str | None = None) -> StoreView:
    scope = pick_scope(store, run_id)
    view = store if scope.is_latest else _StoreAsOf(store.root, scope.last.sequence)
    return StoreView(store, scope, view, _live_catalog(view, scope.last, scope.is_latest),
                     _stage_infos(scope.last.manifest))


def gather_documents(sv: StoreView, doc_ids: list[str], light: bool = False, count: bool = True) -> list[DocumentView]:
    """The documents `doc_ids` with their units at every stage, read with the store's
    doc_id filter; `light` leaves out texts, tracebacks, warnings and own columns.
    With `count`, adds what it reads to each stage's counts."""
    docs: dict[str, DocumentView] = {}
    for d in doc_ids:
        rows = sv.catalog[d]
        path = _canonical_path(rows)
        first = rows[0]
        docs[d] = DocumentView(
            doc_id=d, path=path, other_paths=[r["source_path"] for r in rows if r["source_path"] != path],
            size=first.get("size"), first_run=first.get("first_run"), last_run=first.get("last_run"),
            anchor=f"d-{d}", container=_container_of(sv, rows), holds=sv.held_by().get(d, []),
        )
        access = document_access(rows, AccessSection()).get(d)
        if access is not None and any(r.get("access_rule") for r in rows):
            docs[d].readers, docs[d].label, docs[d].access_rule = access
    stages = sv.stages
    pages: dict[tuple[str, str], PageView] = {}
    chunks: dict[str, ChunkView] = {}
    chunk_ok: dict[str, list[bool]] = {}  # per chunk: ok at each stage that is not format-limited
    for st in stages:
        columns = None
        if light:
            names = set(schema.stage_schema(st.name, st.unit).names)
            columns = [c for c in LIGHT_COLUMNS if c in names]
        table = sv.view.current(st.name, st.unit, doc_ids, columns=columns) if doc_ids else None
        rows = table.to_pylist() if table is not None else []
        own = own_columns(table.schema.names, st.unit) if table is not None and not light else []
        for status, n in Counter(r["status"] for r in rows).items() if count else ():
            st.counts[status] = st.counts.get(status, 0) + n
        held_by = set()
        for row in rows:
            doc = docs.get(row["doc_id"])
            if doc is None:
                continue
            held_by.add(row["doc_id"])
            counts = doc.by_stage.setdefault(st.name, {})
            counts[row["status"]] = counts.get(row["status"], 0) + 1
            unit = _unit_at(st.name, row, own)
            if row.get("format") and not doc.format:
                doc.format = row["format"]
            if row.get("title") and not doc.title:
                doc.title = row["title"]
            if st.unit == "pages":
                key = (row["doc_id"], row["locator"])
                pv = pages.get(key)
                if pv is None:
                    pv = pages[key] = PageView(row["locator"], row.get("page"), [])
                    doc.pages.append(pv)
                pv.stages.append(unit)
                if row.get("language"):
                    pv.language, pv.language_prob = row["language"], row.get("language_prob")
                for col in ("doc_language",):  # a document-level language, where a stage gives one
                    if row.get(col):
                        doc.language = row[col]
            else:
                cid = row.get("chunk_id") or row["unit_id"]
                cv = chunks.get(cid)
                if cv is None:
                    cv = chunks[cid] = ChunkView(
                        chunk_id=cid, index=row.get("chunk_index") or 0,
                        heading_path=list(row.get("heading_path") or []),
                        page_start=row.get("page_start"), page_end=row.get("page_end"),
                        tokens=row.get("token_count"), language=row.get("language"),
                        text=row.get("text") or "", stages=[])
                    doc.chunks.append(cv)
                cv.stages.append(unit)
                # Later stages refine what earlier ones said (the token stage's count wins).
                if row.get("token_count") is not None:
                    cv.tokens = row["token_count"]
                if row.get("language"):
                    cv.language = row["language"]
                if row.get("text"):
                    cv.text = row["text"]
                if row.get("personal_counts"):
                    cv.personal = dict(row["personal_counts"])
                if "duplicate_of" in row and row.get("duplicate_of"):
                    cv.duplicate_of = row["duplicate_of"]
                    cv.similarity = row.get("similarity")
                    cv.duplicate_kind = row.get("duplicate_kind")
                if not st.formats:
                    chunk_ok.setdefault(cid, []).append(row["status"] == "ok")
        if st.formats:
            for d, doc in docs.items():
                if d not in held_by and doc.format and doc.format not in st.formats:
                    doc.passed_by.append(st.name)

    # A chunk is live when every chunk stage that holds it has it ok (as the hand-off says).
    chunk_stages = [s for s in stages if s.unit == "chunks" and not s.formats]
    for cid, cv in chunks.items():
        oks = chunk_ok.get(cid, [])
        cv.live = bool(chunk_stages) and len(oks) == len(chunk_stages) and all(oks) \
            and all(u.status == "ok" for u in cv.stages)

    order = {s.name: i for i, s in enumerate(stages)}
    for doc in docs.values():
        doc.pages.sort(key=lambda p: (p.page is None, p.page or 0, p.locator))
        doc.chunks.sort(key=lambda c: (c.index, c.chunk_id))
        units = [u for p in doc.pages for u in p.stages] + [u for c in doc.chunks for u in c.stages]
        doc.status = worst(u.status for u in units) or "none"
        doc.first_problem = _first_problem(doc, order)
        if doc.language is None:
            langs = Counter(p.language for p in doc.pages if p.language)
            if langs:
                doc.language = langs.most_common(1)[0][0]
    return [docs[d] for d in doc_ids]


def chunk_owners(sv: StoreView, chunk_ids: set[str]) -> dict[str, tuple[str, int]]:
    """chunk_id -> (doc_id, chunk index) for the chunks asked for (duplicate targets),
    read from the first chunk stage with a filter on chunk_id."""
    first = next((s for s in sv.stages if s.unit == "chunks"), None)
    if first is None or not chunk_ids:
        return {}
    wanted = sorted(chunk_ids)
    t = sv.view.stage_rows(first.name, "chunks", None, ["chunk_id", "doc_id", "chunk_index"],
                           extra_filter=ds.field("chunk_id").isin(wanted))
    live = sv.catalog
    return {c: (d, i or 0) for c, d, i in zip(t.column("chunk_id").to_pylist(), t.column("doc_id").to_pylist(),
                                              t.column("chunk_index").to_pylist()) if d in live}


def budget_tokens(stages: list[StageInfo]) -> int | None:
    """A chunk stage's max_tokens parameter, if any (drawn on the chunk-size chart)."""
    for s in stages:
        if s.unit == "chunks" and isinstance(s.params.get("max_tokens"), int):
            return s.params["max_tokens"]
    return None


STATUS_RANK = {s: i for i, s in enumerate(SEVERITY)}


def _first_problem(doc: DocumentView, order: dict[str, int]) -> str:
    """The first failed unit's reason in chain order, else the first dropped or skipped one."""
    found: list[tuple[int, int, int, str]] = []
    rank = {s: i for i, s in enumerate(SEVERITY)}
    for pos, p in enumerate(doc.pages):
        for u in p.stages:
            if u.status != "ok":
                found.append((rank.get(u.status, 9), order.get(u.stage, 99), pos, f"{u.stage}: {u.reason or u.status}"))
    for pos, c in enumerate(doc.chunks):
        for u in c.stages:
            if u.status != "ok":
                found.append((rank.get(u.status, 9), order.get(u.stage, 99), 10**6 + pos,
                              f"{u.stage}: {u.reason or u.status}"))
    return min(found)[3] if found else ""
