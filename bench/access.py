"""Personal-data step throughput beside clean's, and the cost of a change of access.

1. The Debian manuals the reference tests read (pdftotext text of two PDFs, the
   libxslt HTML manual's text): clean over them as pages, then the personal step over
   the same text cut into 2,000-character chunks; MB/s of each and the ratio.
2. The 1,000-document bench drive: a full run, a run with no change, a run where a
   rule for one folder (a tenth of the drive) was added, and one where every
   document's label changed, each as a share of the full run (goal: under 3 %); then
   the labels changed back with the hand-off rebuilt from the stages (the way before
   the hand-off was copied forward), for comparison.
3. The hand-off copied forward with new access columns, on a synthetic hand-off of 200,000 chunks, beside
   a plain pyarrow read and write of the same file, and its cost per million chunks.
"""

from __future__ import annotations

import glob
import os
import subprocess
import tempfile
import time
import warnings
from pathlib import Path

DOCUMENTS = 1000
CHUNK_CHARS = 2000


def _debian_texts() -> list[str]:
    from bs4 import BeautifulSoup, XMLParsedAsHTMLWarning

    out = []
    for pdf in ("/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",
                "/usr/share/doc/libtasn1-doc/libtasn1.pdf"):
        if Path(pdf).exists():
            out.append(subprocess.run(["pdftotext", "-layout", pdf, "-"], capture_output=True, text=True,
                                      check=True).stdout)
    for html in sorted(glob.glob("/usr/share/doc/libxslt1-dev/**/*.html", recursive=True)):
        with warnings.catch_warnings():  # some of these manuals are XHTML; their text is what is wanted
            warnings.simplefilter("ignore", XMLParsedAsHTMLWarning)
            out.append(BeautifulSoup(Path(html).read_bytes(), "lxml").get_text("\n"))
    return out


def throughput() -> None:
    from thresher.steps.clean import CLEAN
    from thresher.steps.personal import PERSONAL, PersonalParams
    from thresher.steps.units import PARAGRAPH, Block, Chunk, Page

    texts = _debian_texts()
    if not texts:
        print("personal vs clean: no Debian manuals found (make system-deps installs them)")
        return
    mb = sum(len(t.encode("utf-8")) for t in texts) / 1e6
    pages = [[Page(locator=f"page/{i + 1}", page=i + 1,
                   blocks=[Block(PARAGRAPH, p) for p in t.split("\n\n") if p.strip()])]
             for i, t in enumerate(texts)]
    chunks = [[Chunk(locator=f"chunk/{j:05d}", text=t[j:j + CHUNK_CHARS])
               for j in range(0, len(t), CHUNK_CHARS)] for t in texts]
    params = PersonalParams(region="GB", countries=["fi", "se", "nl", "no"])
    t = time.perf_counter()
    for doc in pages:
        CLEAN.run(doc, CLEAN.params(), None)
    clean_s = time.perf_counter() - t
    t = time.perf_counter()
    found = 0
    for doc in chunks:
        found += sum(sum(c.payload["personal_counts"].values()) for c in PERSONAL.run(doc, params, None))
    personal_s = time.perf_counter() - t
    print(f"text: {len(texts)} Debian manual files, {mb:.2f} MB")
    print(f"clean     {mb / clean_s:7.2f} MB/s")
    print(f"personal  {mb / personal_s:7.2f} MB/s   {clean_s / personal_s:.2f}x clean's speed "
          f"({found} findings)")


def change_of_access() -> None:
    from thresher.flows import runtime  # noqa: F401

    from bench.warm import start_prefect

    from bench.drive import make_drive
    from thresher.flows import pipeline
    from thresher.flows.config import build_definition, load_definition
    from thresher.flows.handoff import handoff_basis

    start_prefect()
    definition = load_definition()

    def edited(access: dict, origin: str):
        data = definition.model.model_dump(mode="json")
        data["access"] = access
        return build_definition(data, origin)

    base = definition.model.model_dump(mode="json")["access"]
    # A tenth of the drive gains a rule of its own (one folder of notes)...
    folder = edited({**base, "rules": [{"paths": ["notes-3/**"], "readers": ["branch-3"], "label": "branch"}]
                     + base["rules"]}, "bench: one folder's rule")
    # ...then every document's label changes (the default's): every chunk is affected.
    everything = edited({**base, "rules": folder.model.model_dump(mode="json")["access"]["rules"],
                         "default": {"readers": ["staff", "volunteers"], "label": "everyone-internal"}},
                        "bench: default edited")
    with tempfile.TemporaryDirectory() as tmp:
        drive = make_drive(Path(tmp) / "drive", DOCUMENTS)
        store = Path(tmp) / "store"
        runs = []
        for name, d in (("full run", definition), ("no change", definition), ("one folder's rule", folder),
                        ("every label", everything), ("labels back, rebuilt", folder)):
            if name.endswith("rebuilt"):
                # The way before the hand-off was copied forward: a basis that never matches
                # makes the hand-off rebuilt from every stage.
                pipeline.handoff_basis = lambda *a: os.urandom(8).hex()
            t = time.perf_counter()
            m = pipeline.run(d, str(drive), str(store), quiet=True)
            runs.append((name, time.perf_counter() - t, m))
        pipeline.handoff_basis = handoff_basis
    full_s = runs[0][1]
    print(f"drive: {runs[0][2]['documents']['distinct']} documents, {runs[0][2]['chunks']} chunks "
          f"(one process, one Prefect server, runs one after the other; each includes delivery to SQLite)")
    for name, secs, m in runs:
        t = m["timings"]
        print(f"{name:<20} {secs:7.2f} s  {secs / full_s:6.3f} of full  ({m['documents']['processed']} processed, "
              f"{m['changes']['upsert']} upserts; hand-off {m['handoff']} in {t.get('handoff', 0):.2f} s; "
              f"scan+plan {t.get('plan', 0):.2f} s; counts {t.get('counts', 0):.2f} s; run body {m['seconds']:.2f} s, "
              f"outside it {secs - m['seconds']:.2f} s)")


def rewrite_cost(chunks: int = 200_000, per_doc: int = 10, removed_share: float = 0.0) -> None:
    """The hand-off copied forward on a synthetic hand-off, beside a plain pyarrow read
    and write of the same file (same run), and per million chunks: with every label
    changed (removed_share 0), or with that share of the documents removed and access
    unchanged (a week's edits and removals, the stage reads for edits aside)."""
    import random

    import pyarrow as pa
    import pyarrow.parquet as pq

    from bench.drive import _paragraph
    from thresher.flows import schema
    from thresher.flows.config import load_definition
    from thresher.flows.handoff import BASIS_KEY, DIGESTS, _access_bytes, _digest, build_handoff, handoff_basis
    from thresher.flows.store import Store

    rng = random.Random(3)
    definition = load_definition()
    docs = [f"{i:064x}" for i in range(chunks // per_doc)]
    live = {d: (i, f"notes/{i:07d}.md", 0) for i, d in enumerate(docs)}
    old_access = {d: (["staff"], "internal", "access.default") for d in docs}
    new_access = {d: (["staff", "volunteers"], "everyone-internal", "access.default") for d in docs}
    basis = handoff_basis(definition)
    n = len(docs) * per_doc
    doc_of = [docs[i // per_doc] for i in range(n)]
    ids = [f"{i:064x}" for i in range(n)]
    texts = [_paragraph(rng, 12) for _ in range(n)]  # about 1,000 characters each, all different
    table = pa.table({
        "chunk_id": ids, "doc_id": doc_of, "source_path": [live[d][1] for d in doc_of],
        "source_paths": [[live[d][1]] for d in doc_of], "title": ["Branch note"] * n,
        "heading_path": [["Branch note", "Section"]] * n, "chunk_index": [i % per_doc for i in range(n)],
        "page_start": [None] * n, "page_end": [None] * n, "char_start": [0] * n,
        "char_end": [len(t) for t in texts], "prefix_chars": [0] * n, "language": ["en"] * n, "text": texts,
        "token_count": [len(t) // 4 for t in texts], "encoding": ["cl100k_base"] * n,
        "token_counts": [[("cl100k_base", len(t) // 4)] for t in texts], "content_hash": ids,
        "readers": [["staff"]] * n, "label": ["internal"] * n, "run_id": ["bench"] * n,
    }, schema=schema.HANDOFF)
    body = [f"{i:064x}" for i in range(n)]
    access_bytes = _access_bytes(["staff"], "internal")
    digests = pa.table({"chunk_id": ids, "digest": [_digest(b, access_bytes) for b in body], "doc_id": doc_of,
                        "source_path": [live[d][1] for d in doc_of], "content_hash": ids, "body_digest": body},
                       schema=DIGESTS)
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(tmp)
        # Committed as a run would (manifest with the files' checksums, then published),
        # since only a hand-off matching its run's record is rewritten.
        with store.parquet_writer("runs/bench/staged/chunks.parquet",
                                  schema.HANDOFF.with_metadata({BASIS_KEY: basis.encode()}), run_id="bench") as w:
            for start in range(0, n, 20_000):
                w.write_table(table.slice(start, 20_000))
        store.write_table("runs/bench/staged/digests.parquet", digests, run_id="bench")
        store.commit("bench", {"run_id": "bench", "sequence": 1, "withheld": {}, "documents": {"copies": {}},
                               "publish": {"staged/chunks.parquet": "handoff/chunks.parquet",
                                           "staged/digests.parquet": "handoff/digests.parquet"}})
        del table, digests, texts
        size = Path(store.path("handoff/chunks.parquet")).stat().st_size
        t = time.perf_counter()
        copy = pq.read_table(store.path("handoff/chunks.parquet"))
        pq.write_table(copy, store.path("copy.parquet"), compression="zstd")
        copy_s = time.perf_counter() - t
        del copy
        t = time.perf_counter()
        removed = set(docs[::round(1 / removed_share)]) if removed_share else set()
        now_live = {d: v for d, v in live.items() if d not in removed}
        result = build_handoff(definition, store, "bench-2", now_live, old_access if removed else new_access,
                               "staged/chunks.parquet", "staged/digests.parquet", "staged/changes.parquet",
                               basis=basis, previous_live={d: live[d][1] for d in docs})
        rewrite_s = time.perf_counter() - t
    assert result.access_only, result.mode
    assert (result.upserts, result.deletes) == ((0, len(removed) * per_doc) if removed else (n, 0))
    change = f"{len(removed):,} of {len(docs):,} documents removed" if removed else "every label changed"
    print(f"hand-off of {n:,} synthetic chunks ({size / 1e6:.0f} MB Parquet), {change}:")
    print(f"plain pyarrow read + write  {copy_s:6.2f} s   1.00")
    print(f"streamed copy               {rewrite_s:6.2f} s   {rewrite_s / copy_s:.2f}x  "
          f"(checksum check, digests and change set included; {rewrite_s * 1e6 / n:.1f} s per million chunks)")


def main() -> None:
    throughput()
    change_of_access()
    rewrite_cost()
