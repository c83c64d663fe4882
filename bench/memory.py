"""Peak memory of a run on the bench drive and on a drive ten times larger (same mix:
the demo drive, 3 % multi-page PDFs, the rest Markdown and HTML notes; bench/drive.py).

Each run is the default definition in a fresh child process, against one Prefect
server started here first (the server is Prefect's, shared by every run of a team,
and not part of a run's memory). Two figures per run: the peak resident set of the
run's own process, exact (VmHWM, bench.peak_mb: it holds the plan, the catalog,
the corpus steps and the hand-off build), and the peak of its whole process tree
(that process plus the extraction children it forks), polled every 0.1 s with psutil.
Issue 14's target: the larger drive's peaks within 1.5 x the smaller's.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

from bench import REPO
from bench.drive import make_drive
from bench.warm import prefect_server
from bench.scale import _tree_rss

DOCUMENTS = int(os.environ.get("THRESHER_BENCH_MEMORY_DOCUMENTS", "300"))
FACTOR = 10
LIMIT = 1.5

CHILD = r"""
import json, sys
from bench import peak_mb  # run from the repository (cwd)
from thresher.flows import pipeline
from thresher.flows.config import load_definition
m = pipeline.run(load_definition(), sys.argv[1], sys.argv[2], quiet=True)
print(json.dumps({"self": int(peak_mb() * 2**20),
                  "files": m["documents"]["files"],
                  "processed": m["documents"].get("processed", 0), "pages": m["pages"], "chunks": m["chunks"],
                  "seconds": m["seconds"]}))
"""


class TreePeak:
    """The peak resident memory of process `pid` and its children (not those in `skip`
    and theirs), polled every 0.1 s with psutil while the block runs (shared pages count
    in each process)."""

    def __init__(self, pid: int, skip: frozenset[int] = frozenset()) -> None:
        self.pid, self.skip, self.peak = pid, skip, 0
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)

    def _poll(self) -> None:
        while not self._done.is_set():
            self.peak = max(self.peak, _tree_rss(self.pid, skip=self.skip))
            time.sleep(0.1)

    def __enter__(self) -> "TreePeak":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._done.set()
        self._thread.join()


def measure(drive: Path, store: Path, env: dict) -> dict:
    """One run of the default definition in a fresh child process: its manifest's
    figures, its own peak (`self`) and its process tree's (`tree`), in bytes."""
    proc = subprocess.Popen([sys.executable, "-c", CHILD, str(drive), str(store)], env=env, cwd=REPO,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    with TreePeak(proc.pid) as tree:
        out, err = proc.communicate()
    if proc.returncode != 0:
        raise RuntimeError(f"run on {drive} failed: {err[-3000:]}")
    return {**json.loads(out.strip().splitlines()[-1]), "tree": tree.peak}


def main() -> None:
    results = {}
    with prefect_server(), tempfile.TemporaryDirectory() as tmp:
        for n in (DOCUMENTS, DOCUMENTS * FACTOR):
            drive = make_drive(Path(tmp) / f"drive-{n}", n)
            results[n] = measure(drive, Path(tmp) / f"store-{n}", dict(os.environ))
    small, large = results[DOCUMENTS], results[DOCUMENTS * FACTOR]
    print(f"{'drive':<18} {'files':>6} {'pages':>6} {'chunks':>7} {'run s':>6} {'process MB':>10} {'tree MB':>8}")
    for n, r in results.items():
        print(f"{n:>6} documents{'':<2} {r['files']:>6} {r['pages']:>6} {r['chunks']:>7} {r['seconds']:>6.0f} "
              f"{r['self'] / 2**20:>10.0f} {r['tree'] / 2**20:>8.0f}")
    ratio = large["self"] / small["self"]
    tree = large["tree"] / small["tree"]
    print(f"{FACTOR}x the drive: process peak {ratio:.2f}x, tree peak {tree:.2f}x "
          f"(target: within {LIMIT}x) -> {'met' if max(ratio, tree) <= LIMIT else 'NOT MET'}")


if __name__ == "__main__":
    main()
