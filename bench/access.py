"""Personal-data step throughput beside clean's, and the cost of a change of access.

1. The Debian manuals the reference tests read (pdftotext text of two PDFs, the
   libxslt HTML manual's text): clean over them as pages, then the personal step over
   the same text cut into 2,000-character chunks; MB/s of each and the ratio.
2. The 1,000-document bench drive: a full run, then a run where only an access rule
   changed (every document's label), as a share of the full run (goal: under 3 %).
"""

from __future__ import annotations

import glob
import subprocess
import tempfile
import time
from pathlib import Path

DOCUMENTS = 1000
CHUNK_CHARS = 2000


def _debian_texts() -> list[str]:
    from bs4 import BeautifulSoup

    out = []
    for pdf in ("/usr/share/doc/shared-mime-info/shared-mime-info-spec.pdf",
                "/usr/share/doc/libtasn1-doc/libtasn1.pdf"):
        if Path(pdf).exists():
            out.append(subprocess.run(["pdftotext", "-layout", pdf, "-"], capture_output=True, text=True,
                                      check=True).stdout)
    for html in sorted(glob.glob("/usr/share/doc/libxslt1-dev/**/*.html", recursive=True)):
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

    from prefect import flow

    from bench.drive import make_drive
    from thresher.flows import pipeline
    from thresher.flows.config import build_definition, load_definition

    @flow
    def warm_up() -> int:
        return 0

    warm_up()
    definition = load_definition()
    data = definition.model.model_dump(mode="json")
    data["access"]["default"] = {"readers": ["staff", "volunteers"], "label": "everyone-internal"}
    edited = build_definition(data, "bench: access rule edited")
    with tempfile.TemporaryDirectory() as tmp:
        drive = make_drive(Path(tmp) / "drive", DOCUMENTS)
        store = Path(tmp) / "store"
        t = time.perf_counter()
        full = pipeline.run(definition, str(drive), str(store), quiet=True)
        full_s = time.perf_counter() - t
        t = time.perf_counter()
        acc = pipeline.run(edited, str(drive), str(store), quiet=True)
        acc_s = time.perf_counter() - t
    print(f"drive: {full['documents']['distinct']} documents, {full['chunks']} chunks")
    print(f"full run            {full_s:7.2f} s   1.00")
    print(f"access rule edited  {acc_s:7.2f} s   {acc_s / full_s:.3f} of full  "
          f"({acc['documents']['processed']} processed, {acc['changes']['upsert']} upserts)")


def main() -> None:
    throughput()
    change_of_access()
