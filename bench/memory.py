"""Peak memory of a run on the bench drive and on a drive ten times larger (same mix:
the demo drive, 3 % multi-page PDFs, the rest Markdown and HTML notes; bench/drive.py).

Each run is the default definition in a fresh child process, against one Prefect
server started here first (the server is Prefect's, shared by every run of a team,
and not part of a run's memory). Two figures per run: the peak resident set of the
run's own process, exact (getrusage RUSAGE_SELF: it holds the plan, the catalog,
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

from bench.drive import make_drive
from bench.scale import _tree_rss

DOCUMENTS = int(os.environ.get("THRESHER_BENCH_MEMORY_DOCUMENTS", "300"))
FACTOR = 10
LIMIT = 1.5

CHILD = r"""
import json, resource, sys
from thresher.flows import pipeline
from thresher.flows.config import load_definition
m = pipeline.run(load_definition(), sys.argv[1], sys.argv[2], quiet=True)
kb = 1024  # ru_maxrss is in KiB on Linux
print(json.dumps({"self": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * kb,
                  "files": m["documents"]["files"], "pages": m["pages"], "chunks": m["chunks"],
                  "seconds": m["seconds"]}))
"""


def measure(drive: Path, store: Path, env: dict) -> dict:
    proc = subprocess.Popen([sys.executable, "-c", CHILD, str(drive), str(store)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    done = threading.Event()
    peak = 0

    def poll() -> None:
        nonlocal peak
        while not done.is_set():
            peak = max(peak, _tree_rss(proc.pid))
            time.sleep(0.1)

    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    out, err = proc.communicate()
    done.set()
    watcher.join()
    if proc.returncode != 0:
        raise RuntimeError(f"run on {drive} failed: {err[-3000:]}")
    return {**json.loads(out.strip().splitlines()[-1]), "tree": peak}


def main() -> None:
    from thresher.flows import runtime  # noqa: F401
    from prefect.server.api.server import SubprocessASGIServer

    from thresher.flows.pipeline import _free_port

    server = SubprocessASGIServer(port=_free_port())
    server.start(timeout=120)
    env = {**os.environ, "PREFECT_API_URL": server.api_url}
    results = {}
    try:
        with tempfile.TemporaryDirectory() as tmp:
            for n in (DOCUMENTS, DOCUMENTS * FACTOR):
                drive = make_drive(Path(tmp) / f"drive-{n}", n)
                results[n] = measure(drive, Path(tmp) / f"store-{n}", env)
    finally:
        server.stop()
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
