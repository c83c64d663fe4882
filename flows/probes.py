"""Retrieval probes: questions a team expects its chunks to answer, checked after a run.

A probe file is YAML of our own shape:

    questions:
      - ask: When does the Brackenmoor branch open again?
        expect: notices/brackenmoor-closure.*   # a source path or a glob over paths
        page: 1                                  # optional: the chunk must touch this page
        heading: Opening hours                   # optional: words of the chunk's heading path

Each question is answered with a BM25 keyword ranking (thresher.steps.bm25) over the
run's live chunks, with the RSJ term weight floored at zero: a word in more than half of
a drive's chunks (the organisation's own name, say) is no evidence either way, where the
unfloored weight would push down every chunk holding it (the same floor as bm25s's
default "robertson" scoring) — nothing leaves the machine and no model is needed. The indexed
text of a chunk is its heading path followed by its text, since a reader's question
often names the section (common practice for heading-split chunks, no source). A probe
passes when a chunk of the expected document (on the page, under the heading, when
given) ranks within the first `TOP` chunks; its rank is recorded up to `DEPTH`.
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from thresher.flows import schema
from thresher.steps.bm25 import BM25, terms

TOP = 5  # a probe passes when the expected document ranks within this many chunks
DEPTH = 100  # ranks beyond this are recorded as not found


class ProbeIndex(BM25):
    """BM25 with the term weight floored at zero (see the module's docstring), ranked
    from postings: a question touches only the chunks that hold one of its terms, so
    time per question follows those, not the drive."""

    def __post_init__(self) -> None:
        super().__post_init__()
        self._postings: dict[str, list[int]] = {}
        for i, counts in enumerate(self._tf):
            for t in counts:
                self._postings.setdefault(t, []).append(i)

    def idf(self, term: str) -> float:
        return max(super().idf(term), 0.0)

    def rank(self, query: str, k: int | None = None) -> list[int]:
        """Indexes best first; chunks with no score follow in order (as BM25.rank ties)."""
        q = {t: self.idf(t) for t in set(terms(query)) if t in self._postings}
        scores: dict[int, float] = {}
        for t, w in q.items():
            if w <= 0:
                continue
            for i in self._postings[t]:
                dl = self._len[i]
                norm = self.k1 * ((1 - self.b) + self.b * dl / self._avdl)
                tf = self._tf[i][t]
                scores[i] = scores.get(i, 0.0) + tf / (norm + tf) * w
        order = sorted((i for i, v in scores.items() if v > 0), key=lambda i: (-scores[i], i))
        limit = len(self.texts) if k is None else k
        if len(order) < limit:
            seen = set(order)
            order += [i for i in range(len(self.texts)) if i not in seen][:limit - len(order)]
        return order[:limit]


class ProbeError(ValueError):
    """A probe file that cannot be used; the message names the file and key."""


class Probe(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    ask: str = Field(min_length=1)
    expect: str = Field(min_length=1)
    page: int | None = Field(default=None, ge=1)
    heading: str | None = None


class ProbeFile(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    questions: list[Probe] = Field(min_length=1)


def load_probes(path: str | Path) -> list[Probe]:
    p = Path(path)
    if not p.is_file():
        raise ProbeError(f"probe file not found: {p}")
    try:
        data = yaml.safe_load(p.read_text("utf-8"))
    except yaml.YAMLError as exc:
        raise ProbeError(f"{p}: not valid YAML ({exc})".replace("\n", " ")) from None
    try:
        return list(ProbeFile.model_validate(data).questions)
    except ValidationError as exc:
        errors = []
        for e in exc.errors():
            loc = ".".join(str(x) if not isinstance(x, int) else f"[{x}]" for x in e["loc"]).replace(".[", "[")
            errors.append(f"{loc or '(top)'}: {e['msg']}")
        raise ProbeError(f"{p}: " + "; ".join(errors)) from None


@dataclass
class ProbeSummary:
    count: int
    hit_at_1: float
    hit_at_5: float
    regressions: list[int]  # probe numbers (1-based) that passed in the previous run and fail now
    previous_run: str | None

    def as_dict(self) -> dict:
        return {"count": self.count, "hit_at_1": self.hit_at_1, "hit_at_5": self.hit_at_5,
                "regressions": self.regressions, "previous_run": self.previous_run}


def _matches(probe: Probe, path: str, paths: list[str], page_start, page_end, heading_path) -> bool:
    if not any(fnmatch.fnmatchcase(p, probe.expect) for p in [path, *paths]):
        return False
    if probe.page is not None:
        if page_start is None or not (page_start <= probe.page <= (page_end or page_start)):
            return False
    if probe.heading is not None:
        if probe.heading.casefold() not in " > ".join(heading_path or []).casefold():
            return False
    return True


def answer_probes(probes: list[Probe], chunks: pa.Table, run_id: str,
                  previous: pa.Table | None = None, previous_run: str | None = None
                  ) -> tuple[pa.Table, ProbeSummary]:
    """One row per probe (schema.PROBES) and the summary; `previous` is the last probed run's table."""
    cols = chunks.column_names
    ids = chunks.column("chunk_id").to_pylist()
    paths = chunks.column("source_path").to_pylist()
    texts = chunks.column("text").to_pylist()
    headings = chunks.column("heading_path").to_pylist() if "heading_path" in cols else [[]] * len(ids)
    starts = chunks.column("page_start").to_pylist() if "page_start" in cols else [None] * len(ids)
    ends = chunks.column("page_end").to_pylist() if "page_end" in cols else [None] * len(ids)
    # Every path the document's bytes sit at, where the hand-off lists them.
    others = chunks.column("source_paths").to_pylist() if "source_paths" in cols else [[]] * len(ids)
    index = ProbeIndex([" > ".join(h or []) + "\n" + (t or "") for h, t in zip(headings, texts)])
    passed_before = set()
    if previous is not None:
        # Matched by question and expectation, so an edited or reordered file still compares.
        passed_before = {(r["ask"], r["expect"]) for r in previous.to_pylist() if r["passed"]}
    rows = []
    for n, probe in enumerate(probes, start=1):
        order = index.rank(probe.ask, DEPTH)
        rank = next((k for k, i in enumerate(order, start=1)
                     if _matches(probe, paths[i], others[i] or [], starts[i], ends[i], headings[i])), None)
        hit = order[rank - 1] if rank else None
        passed = rank is not None and rank <= TOP
        rows.append({
            "run_id": run_id, "probe": n, "ask": probe.ask, "expect": probe.expect,
            "page": probe.page, "heading": probe.heading, "rank": rank,
            "chunk_id": ids[hit] if hit is not None else None,
            "source_path": paths[hit] if hit is not None else None,
            "top_chunk_ids": [ids[i] for i in order[:TOP]],
            "top_paths": [paths[i] for i in order[:TOP]],
            "passed": passed, "regression": (not passed) and (probe.ask, probe.expect) in passed_before,
        })
    table = pa.Table.from_pylist(rows, schema=schema.PROBES)
    count = len(rows)
    summary = ProbeSummary(
        count=count,
        hit_at_1=round(sum(1 for r in rows if r["rank"] == 1) / count, 4) if count else 0.0,
        hit_at_5=round(sum(1 for r in rows if r["passed"]) / count, 4) if count else 0.0,
        regressions=[r["probe"] for r in rows if r["regression"]],
        previous_run=previous_run,
    )
    return table, summary


def probes_rel(run_id: str) -> str:
    return f"probes/{run_id}.parquet"


CHUNK_COLUMNS = ["chunk_id", "source_path", "text", "heading_path", "page_start", "page_end"]


def probe_run(store, chunks_rel: str, run_id: str, probe_file: str, staged_rel: str) -> ProbeSummary:
    """Answer the probe file over a run's (staged) hand-off and stage the results."""
    probes = load_probes(probe_file)
    try:
        chunks = store.read_table(chunks_rel, columns=CHUNK_COLUMNS + ["source_paths"])
    except (KeyError, pa.ArrowInvalid):
        chunks = store.read_table(chunks_rel, columns=CHUNK_COLUMNS)
    previous, previous_run = None, None
    for r in reversed(store.runs()):
        rel = store.published(probes_rel(r.run_id))
        if rel is not None:
            previous, previous_run = store.read_table(rel), r.run_id
            break
    table, summary = answer_probes(probes, chunks, run_id, previous, previous_run)
    store.write_table(staged_rel, table, run_id=run_id)
    return summary
