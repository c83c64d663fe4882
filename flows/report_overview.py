"""What the summary page shows, folded one document at a time (no HTML here).

`Overview.add` takes a document as report_data gathered it and keeps only a small row
for the documents list and running totals for the charts and the problem groups, so
the summary costs little memory whatever the size of the drive.
"""

from __future__ import annotations

import bisect
import re
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime
from typing import Callable

from thresher.flows.report_data import SEVERITY, STATUS_RANK, ChunkView, DocumentView, Scope, StageInfo, UnitAtStage

# Documents named per problem group on the summary; the documents list has them all.
MAX_PROBLEM_LINKS = 12

_ID_LIKE = re.compile(r"\b[0-9a-f]{12,}\b")
DUPLICATE_KIND = {"exact": "exact duplicate of a chunk kept elsewhere",
                  "near": "near-duplicate of a chunk kept elsewhere",
                  "document": "copy of another document: every chunk is kept there"}


def reason_kind(unit: UnitAtStage, chunk: ChunkView | None) -> str:
    """What a unit's reason says, without the ids and paths that make each one unique."""
    if chunk is not None and unit.status == "dropped" and chunk.duplicate_of:
        kind = chunk.duplicate_kind or ""
        return DUPLICATE_KIND.get(kind, f"{kind} duplicate".strip())
    return _ID_LIKE.sub("…", unit.reason or unit.error_type or unit.status)


def suffix(path: str) -> str:
    name = path.rsplit("/", 1)[-1]
    return name.rsplit(".", 1)[-1].lower() if "." in name else ""


@dataclass
class DocRow:
    """One line of the documents list."""

    doc_id: str
    path: str
    other_paths: list[str]
    format: str
    pages: int
    live: int
    dropped: int
    tokens: int
    language: str
    status: str
    first_problem: str
    href: str


def _order(r: DocRow) -> tuple[int, str]:
    return (STATUS_RANK.get(r.status, len(SEVERITY)), r.path)


@dataclass
class ProblemGroup:
    status: str
    stage: str
    reason: str
    count: int = 0
    docs: list[DocRow] = field(default_factory=list)  # the first MAX_PROBLEM_LINKS


@dataclass
class Overview:
    """Totals of a report's documents; `href` makes the link to a document's page."""

    scope: Scope
    stages: list[StageInfo]
    store_root: str
    href: Callable[[str], str]
    budget_tokens: int | None = None
    generated_at: datetime = field(default_factory=lambda: datetime.now().astimezone())
    rows: list[DocRow] = field(default_factory=list)
    problems: dict[tuple[str, str, str], ProblemGroup] = field(default_factory=dict)
    lang_chunks: Counter = field(default_factory=Counter)
    lang_tokens: Counter = field(default_factory=Counter)
    lang_docs: Counter = field(default_factory=Counter)
    chunk_sizes: Counter = field(default_factory=Counter)
    label_chunks: Counter = field(default_factory=Counter)  # access label -> live chunks
    label_docs: Counter = field(default_factory=Counter)
    access: list[tuple[DocRow, list[str] | None, str | None, str | None]] = field(default_factory=list)
    personal: dict[str, list[tuple[DocRow, int]]] = field(default_factory=dict)  # kind -> documents, findings
    list_pages: list[dict] = field(default_factory=list)  # set by the writer (report_sections.list_pages)
    probes: list[dict] = field(default_factory=list)  # the last covered run's probe rows (set by the writer)
    targets: list[dict] = field(default_factory=list)  # delivery targets and how far behind (set by the writer)
    _position: dict[str, int] = field(default_factory=dict)

    @property
    def manifest(self) -> dict:
        return self.scope.base.manifest

    def add(self, doc: DocumentView) -> DocRow:
        row = DocRow(
            doc_id=doc.doc_id, path=doc.path, other_paths=list(doc.other_paths),
            format=doc.format or suffix(doc.path), pages=doc.page_count, live=len(doc.live_chunks),
            dropped=sum(1 for c in doc.chunks if c.status == "dropped"), tokens=doc.tokens,
            language=doc.language or "-", status=doc.status, first_problem=doc.first_problem,
            href=self.href(doc.doc_id))
        self.rows.append(row)
        langs = set()
        for c in doc.live_chunks:
            lang = c.language or "unknown"
            self.lang_chunks[lang] += 1
            self.lang_tokens[lang] += c.tokens or 0
            langs.add(lang)
            if c.tokens is not None:
                self.chunk_sizes[c.tokens] += 1
        for lang in langs:
            self.lang_docs[lang] += 1
        label = doc.label or "(no label)"
        self.label_chunks[label] += len(doc.live_chunks)
        self.label_docs[label] += 1
        self.access.append((row, doc.readers, doc.label, doc.access_rule))
        for kind, n in doc.personal.items():
            self.personal.setdefault(kind, []).append((row, n))
        found = {(u.status, u.stage, reason_kind(u, None)) for p in doc.pages for u in p.stages if u.status != "ok"}
        found |= {(u.status, u.stage, reason_kind(u, c)) for c in doc.chunks for u in c.stages if u.status != "ok"}
        found |= {("judged", u.stage, what) for p in doc.pages for u in p.stages for what in u.judged}
        for key in found:
            group = self.problems.get(key)
            if group is None:
                group = self.problems[key] = ProblemGroup(*key)
            group.count += 1
            # Documents arrive in doc_id order; keep the first ones in list order.
            bisect.insort(group.docs, row, key=_order)
            del group.docs[MAX_PROBLEM_LINKS:]
        return row

    def finish(self) -> None:
        """Worst status first, then by path (the documents list and the problem links)."""
        self.rows.sort(key=_order)
        self._position = {r.doc_id: i for i, r in enumerate(self.rows)}

    def path_of(self, doc_id: str) -> str:
        return self.rows[self._position[doc_id]].path

    def problem_groups(self) -> list[ProblemGroup]:
        stage_pos = {s.name: i for i, s in enumerate(self.stages)}
        return sorted(self.problems.values(), key=lambda g: (STATUS_RANK.get(g.status, 9),
                                                             stage_pos.get(g.stage, 99), -g.count, g.reason))

    @property
    def failed_docs(self) -> int:
        return sum(1 for r in self.rows if r.status == "failed")

    @property
    def skipped_docs(self) -> int:
        """Files skipped as not documents (images without OCR, web assets...)."""
        return sum(1 for r in self.rows if r.status == "skipped")
