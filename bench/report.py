"""The review pages on a generated drive of N and of 10N documents, side by side.

Each store is built by the real flow. `thresher report` is timed in a fresh child
process (so its peak memory is its own: VmHWM, bench.peak_mb): written the first time (every
document's page), again with nothing changed, and again after 1% of the files changed
and a run processed them. The summary file's size and the folder's size are printed
with each. A child that only imports the report modules gives the memory floor.
THRESHER_BENCH_REPORT_N sets N (default 300, so 10N is 3,000 documents).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench import REPO
from bench.drive import change_files, make_drive

N = int(os.environ.get("THRESHER_BENCH_REPORT_N", "300"))

CHILD = """
import json, sys, time
from bench import peak_mb  # run from the repository (cwd)
from thresher.flows.report import write_report
from thresher.flows.store import Store
if sys.argv[1] == "-":
    print(json.dumps({"seconds": 0.0, "peak_mb": peak_mb()}))
    sys.exit(0)
t = time.perf_counter()
done = write_report(Store(sys.argv[1]), sys.argv[2])
seconds = time.perf_counter() - t
print(json.dumps({"seconds": seconds, "peak_mb": peak_mb(),
                  "written": done.pages_written, "documents": done.documents}))
"""


def _report(store: Path, out: Path) -> dict:
    done = subprocess.run([sys.executable, "-c", CHILD, str(store), str(out)], check=True, capture_output=True,
                          text=True, cwd=REPO)
    figures = json.loads(done.stdout.strip().splitlines()[-1])
    if str(store) != "-":
        figures["summary_kb"] = out.stat().st_size / 1024
        folder = out.with_name(f"{out.stem}-pages")
        figures["folder_mb"] = sum(f.stat().st_size for f in folder.iterdir()) / 2**20
    return figures


def _measure(definition, root: Path, documents: int) -> dict:
    from thresher.flows import pipeline

    print(f"  building a store of about {documents:,} documents ...", file=sys.stderr, flush=True)
    drive = make_drive(root / "drive", documents, large_share=0.01)
    store = root / "store"
    t = time.perf_counter()
    m = pipeline.run(definition, str(drive), str(store), quiet=True)
    run_seconds = time.perf_counter() - t
    out = root / "review" / "report.html"
    print(f"  run took {run_seconds:.0f} s; writing the report ...", file=sys.stderr, flush=True)
    first = _report(store, out)
    again = _report(store, out)
    change_files(drive, 0.01)
    pipeline.run(definition, str(drive), str(store), quiet=True)
    changed = _report(store, out)
    return {"documents": m["documents"]["distinct"], "chunks": m["chunks"], "run_seconds": run_seconds,
            "first": first, "again": again, "changed": changed}


def main() -> None:
    from thresher.flows import runtime  # noqa: F401
    from thresher.flows.config import load_definition

    definition = load_definition()
    floor = json.loads(subprocess.run([sys.executable, "-c", CHILD, "-"], check=True, capture_output=True,
                                      text=True, cwd=REPO).stdout)["peak_mb"]
    results = []
    for documents in (N, 10 * N):
        with tempfile.TemporaryDirectory() as tmp:
            results.append(_measure(definition, Path(tmp), documents))
    small, large = results
    print(f"stores: {small['documents']:,} and {large['documents']:,} live documents "
          f"({small['chunks']:,} and {large['chunks']:,} chunks); flow runs took "
          f"{small['run_seconds']:.0f} s and {large['run_seconds']:.0f} s")
    print(f"memory floor (a child that imports the report modules): {floor:.0f} MB")
    print(f"{'report':<28}{'N':>12}{'10N':>12}{'ratio':>8}")

    def line(label: str, a: float, b: float, unit: str, fmt: str = ".2f") -> None:
        ratio = f"{b / a:>7.2f}x" if a else f"{'-':>8}"
        print(f"{label:<28}{a:>10{fmt}} {unit:<1}{b:>10{fmt}} {unit:<1}{ratio}")

    for key, label in (("first", "first write"), ("again", "nothing changed"), ("changed", "1% changed")):
        a, b = small[key], large[key]
        line(f"{label}: time (s)", a["seconds"], b["seconds"], "")
        line(f"{label}: peak memory (MB)", a["peak_mb"], b["peak_mb"], "")
        line(f"{label}: pages written", a["written"], b["written"], "", ".0f")
    line("summary file (KB)", small["first"]["summary_kb"], large["first"]["summary_kb"], "", ".1f")
    line("folder of pages (MB)", small["first"]["folder_mb"], large["first"]["folder_mb"], "", ".1f")


if __name__ == "__main__":
    main()
