"""`thresher verify`: prove a store intact, or say exactly what is not.

Checks, each finding one line:
  - every file a committed run's manifest (or a stage's compaction record) lists exists
    with the size and SHA-256 recorded when it was written;
  - every ledger names exactly the documents its part file holds;
  - every hand-off chunk walks back to a current chunk row and its document to
    current rows of the first stage;
  - the catalog and the current view agree (present documents have rows; hand-off
    documents are present, under a path the catalog gives them).
A damaged or missing part is reported with the documents it holds, and whether the
current view still needs it: a part every one of whose documents was re-run since
(`thresher rerun`) is superseded, a note rather than a problem.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import pyarrow.parquet as pq

from thresher.flows.store import COMPACTED, Store, StoreError
from thresher.flows.summary import stages_of

PROBLEM = "problem"
NOTE = "note"


@dataclass
class Finding:
    kind: str  # missing | damaged | ledger | handoff | catalog | unreadable
    path: str
    message: str
    severity: str = PROBLEM
    documents: list[str] = field(default_factory=list)  # source paths it concerns
    stage: str | None = None  # the stage of a part or ledger
    doc_ids: list[str] = field(default_factory=list)

    def line(self) -> str:
        docs = ""
        if self.documents:
            shown = ", ".join(self.documents[:5]) + (f" and {len(self.documents) - 5} more"
                                                     if len(self.documents) > 5 else "")
            docs = f"; holds {len(self.documents)} document(s): {shown}"
        return f"{self.severity}: {self.kind} {self.path}: {self.message}{docs}"

    def as_dict(self) -> dict:
        return asdict(self)


def _stage_of(rel: str, run_id: str) -> str | None:
    parts = rel.split("/")
    if parts[0] == "stages" and len(parts) >= 3:
        return parts[1]
    if rel.startswith(f"runs/{run_id}/writes/") and len(parts) >= 4:
        return parts[3]
    return None


class _Verifier:
    def __init__(self, store: Store):
        self.store = store
        self.runs = store.runs(refresh=True)
        self.seq = {r.run_id: r.sequence for r in self.runs}
        self.findings: list[Finding] = []
        self.paths: dict[str, list[str]] = {}
        try:
            for r in store.catalog().to_pylist():
                self.paths.setdefault(r["doc_id"], []).append(r["source_path"])
        except (OSError, StoreError, Exception) as exc:  # noqa: BLE001 - any failure to read is the finding
            self.add("unreadable", "catalog.parquet", str(exc).splitlines()[0])
        self.stages = stages_of(self.runs[-1].manifest) if self.runs else []

    def add(self, kind: str, path: str, message: str, severity: str = PROBLEM, docs=(), stage=None,
            doc_ids=()) -> None:
        self.findings.append(Finding(kind, path, message, severity, sorted(docs), stage, sorted(doc_ids)))

    def doc_names(self, doc_ids) -> list[str]:
        return sorted(min(self.paths[d]) if d in self.paths else d for d in set(doc_ids))

    # -------------------------------------------------------------- files and checksums

    def check_file(self, rel: str, record: list, owner: str, docs_of=None, superseded=None,
                   stage: str | None = None) -> bool:
        size, sha = record
        if not self.store.exists(rel):
            found = None
        else:
            try:
                found = self.store.file_record(rel)
            except OSError as exc:
                self.add("unreadable", rel, exc.strerror or str(exc))
                return False
        if found is not None and found[0] == size and found[1] == sha:
            return True
        if found is None:
            kind, what = "missing", f"recorded at {owner} but not in the store"
        elif found[0] != size:
            kind, what = "damaged", f"{found[0]} bytes, {size} recorded at {owner}"
        else:
            kind, what = "damaged", f"checksum differs from the one recorded at {owner}"
        docs = docs_of() if docs_of else []
        severity = PROBLEM
        if superseded is not None and docs and superseded(docs):
            severity, what = NOTE, what + "; superseded: every document it holds was re-run since"
        self.add(kind, rel, what, severity, self.doc_names(docs), stage, docs)
        return False

    def floors(self, stage: str) -> dict[str, int]:
        return self.store._writes(stage, self.seq)

    def run_files(self) -> None:
        publisher = {final: r.run_id for final, r in self.store.publishers().items()}
        retired = self.store.retired_changes()
        covered = {s: set((self.store.compaction(s) or {}).get("runs", [])) for s, _ in self.stages}
        floors = {s: self.floors(s) for s, _ in self.stages}
        for r in self.runs:
            files = r.manifest.get("files")
            if files is None:
                self.add("unrecorded", f"runs/{r.run_id}/manifest.json",
                         "written before manifests recorded checksums; its files are not checked", NOTE)
                continue
            for rel, record in sorted(files.items()):
                stage = _stage_of(rel, r.run_id)
                if stage is not None and r.run_id in covered.get(stage, ()):
                    continue  # compacted: checked through the compaction record
                if rel in publisher and publisher[rel] != r.run_id:
                    continue  # replaced by a later run's copy
                if rel.startswith("handoff/changes/") and r.run_id in retired:
                    continue
                where = self.store.published(rel) or rel if rel in publisher else rel
                docs_of = superseded = None
                if stage is not None:
                    name = rel.rsplit("/", 1)[1]
                    ledger = f"runs/{r.run_id}/writes/{stage}/{name}"
                    part = f"stages/{stage}/{r.run_id}/{name}"
                    docs_of = (lambda lr=ledger, pr=part: self.docs_in(lr) or self.docs_in(pr))
                    seq = r.sequence
                    fl = floors.get(stage, {})
                    superseded = (lambda docs, seq=seq, fl=fl: all(fl.get(d, 0) > seq for d in docs))
                self.check_file(where, record, f"commit of run {r.run_id}", docs_of, superseded, stage)

    def docs_in(self, rel: str) -> list[str]:
        try:
            return sorted(set(pq.read_table(self.store.path(rel), filesystem=self.store.fs,
                                            columns=["doc_id"]).column("doc_id").to_pylist()))
        except Exception:  # noqa: BLE001 - unreadable: no documents to name from it
            return []

    def compacted_files(self) -> None:
        for stage, _ in self.stages:
            rec = self.store.compaction(stage)
            if rec is None:
                continue
            folder = f"stages/{stage}/{COMPACTED}/{rec['generation']}"
            ledger = f"{folder}/ledger.parquet"
            for rel, record in sorted(rec["files"].items()):
                def docs_of(rel=rel, ledger=ledger):
                    try:
                        t = pq.read_table(self.store.path(ledger), filesystem=self.store.fs).to_pylist()
                    except Exception:  # noqa: BLE001
                        return self.docs_in(rel)
                    name = rel.rsplit("/", 1)[1]
                    return sorted({e["doc_id"] for e in t if e["part"] == name})
                self.check_file(rel, record, f"compaction {rec['generation']}", docs_of, stage=stage)

    # -------------------------------------------------------------- ledgers

    def ledgers(self) -> None:
        for stage, _ in self.stages:
            rec = self.store.compaction(stage)
            covered = set((rec or {}).get("runs", []))
            for r in self.runs:
                if r.run_id in covered:
                    continue
                for rel in self.store.files_under(f"runs/{r.run_id}/writes/{stage}"):
                    name = rel.rsplit("/", 1)[1]
                    part = f"stages/{stage}/{r.run_id}/{name}"
                    try:
                        t = pq.read_table(self.store.path(rel), filesystem=self.store.fs, columns=["doc_id", "scope"])
                    except Exception:  # noqa: BLE001 - reported by the checksum check
                        continue
                    entries = list(zip(t.column("doc_id").to_pylist(), t.column("scope").to_pylist()))
                    self.compare(rel, {d for d, _ in entries}, part, {d for d, sc in entries if sc == "document"})
            if rec is not None:
                folder = f"stages/{stage}/{COMPACTED}/{rec['generation']}"
                try:
                    t = pq.read_table(self.store.path(f"{folder}/ledger.parquet"), filesystem=self.store.fs).to_pylist()
                except Exception:  # noqa: BLE001 - reported by the checksum check
                    continue
                by_part: dict[str, set[str]] = {}
                for e in t:
                    if e["part"]:
                        by_part.setdefault(e["part"], set()).add(e["doc_id"])
                for part, docs in sorted(by_part.items()):
                    self.compare(f"{folder}/ledger.parquet", docs, f"{folder}/{part}")

    def compare(self, ledger: str, listed: set[str], part: str, may_be_empty: set[str] = frozenset()) -> None:
        """A part holds exactly the documents its ledger lists, except that a document
        rewritten whole may have no row at all (every unit of it was removed)."""
        if not self.store.exists(part):
            return  # reported as missing by the checksum check
        held = set(self.docs_in(part))
        extra, lacking = held - listed, listed - held - set(may_be_empty)
        if extra or lacking:
            what = []
            if lacking:
                what.append(f"lists {len(lacking)} document(s) the part does not hold")
            if extra:
                what.append(f"leaves out {len(extra)} document(s) the part holds")
            self.add("ledger", part, f"ledger {ledger} " + " and ".join(what), docs=self.doc_names(extra | lacking))

    # -------------------------------------------------------------- hand-off and catalog

    def views(self) -> None:
        if not self.stages:
            return
        store = self.store
        present: dict[str, list[str]] = {}
        try:
            for r in store.catalog().to_pylist():
                if r["present"]:
                    present.setdefault(r["doc_id"], []).append(r["source_path"])
        except Exception:  # noqa: BLE001 - reported above
            return
        first, first_unit = self.stages[0]
        chunk_stages = [s for s, u in self.stages if u == "chunks"]
        try:
            first_docs = set(store.current(first, first_unit, sorted(present), columns=["doc_id"])
                             .column("doc_id").to_pylist())
        except StoreError as exc:
            self.add("unreadable", first, str(exc))
            return
        for d in sorted(set(present) - first_docs):
            self.add("catalog", "catalog.parquet", f"present document has no current {first} row",
                     docs=[min(present[d])])
        try:
            handoff = store.handoff()
        except Exception as exc:  # noqa: BLE001
            self.add("unreadable", "handoff/chunks.parquet", str(exc).splitlines()[0])
            return
        if handoff is None or not chunk_stages:
            return
        rows = handoff.select(["chunk_id", "doc_id", "source_path"]).to_pylist()
        docs = sorted({r["doc_id"] for r in rows})
        try:
            last = set(store.current(chunk_stages[-1], "chunks", docs, columns=["chunk_id"])
                       .column("chunk_id").to_pylist())
        except StoreError as exc:
            self.add("unreadable", chunk_stages[-1], str(exc))
            return
        for r in rows:
            if r["chunk_id"] not in last:
                self.add("handoff", "handoff/chunks.parquet",
                         f"chunk {r['chunk_id']} has no current {chunk_stages[-1]} row", docs=[r["source_path"]])
            elif r["doc_id"] not in first_docs:
                self.add("handoff", "handoff/chunks.parquet",
                         f"chunk {r['chunk_id']} does not walk back to a current {first} row",
                         docs=[r["source_path"]])
            elif r["doc_id"] not in present:
                self.add("catalog", "handoff/chunks.parquet",
                         f"chunk {r['chunk_id']} belongs to a document the catalog has no present file for",
                         docs=[r["source_path"]])
            elif r["source_path"] not in present[r["doc_id"]]:
                self.add("catalog", "handoff/chunks.parquet",
                         f"chunk {r['chunk_id']} names a path the catalog does not give its document",
                         docs=[r["source_path"]])


def verify(store: Store) -> list[Finding]:
    """Every finding about the store, problems first; an empty list means intact."""
    v = _Verifier(store)
    v.run_files()
    v.compacted_files()
    v.ledgers()
    if not any(f.kind in ("missing", "damaged", "unreadable") and f.severity == PROBLEM for f in v.findings):
        v.views()  # reads the current view: only meaningful over intact files
    return sorted(v.findings, key=lambda f: (f.severity != PROBLEM, f.kind, f.path))


def damaged_documents(findings: list[Finding], steps: list[str]) -> dict[str, str]:
    """doc_id -> the earliest step whose stored rows of it are damaged or missing:
    where `thresher rerun --damaged` starts each document."""
    out: dict[str, str] = {}
    for f in findings:
        if f.severity != PROBLEM or f.kind not in ("damaged", "missing") or f.stage not in steps:
            continue
        for d in f.doc_ids:
            if d not in out or steps.index(f.stage) < steps.index(out[d]):
                out[d] = f.stage
    return out
