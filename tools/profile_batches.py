#!/usr/bin/env python3
"""Where the parent of a run spends its time per batch: cProfile around every
`BatchRunner.run` (each in its own thread), on the thread CPU clock or the wall clock.

Usage (from the repo, with the venv's python):
  python tools/profile_batches.py drive DRIVE SMALL LARGE        # build a bench drive (bench/drive.py)
  python tools/profile_batches.py run KIND WORKERS CLOCK DRIVE STORE OUT [BATCH]
      KIND: sequential | threads; CLOCK: cpu (time.thread_time) | wall (perf_counter)

Prints, per segment, the batches, their summed wall time and the parent thread's CPU
time inside them (thread_time, measured beside the profiler), and writes the merged
profile (by own time and by cumulative time) and the main thread's profile to OUT.
Only threads and sequential: a process pool's or Dask worker's batches run in other
interpreters, which this does not reach. Under cProfile the CPU clock costs a system
call per event, so CPU figures are inflated: compare them with each other, not with
wall times of runs without the profiler.
"""

from __future__ import annotations

import cProfile
import io
import pstats
import sys
import threading
import time
from pathlib import Path


def _drive(root: str, small: int, large: int) -> None:
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from bench.drive import add_large_pdfs, make_drive

    add_large_pdfs(make_drive(Path(root), small), large)


def _run(kind: str, workers: int, clock: str, drive: str, store: str, out: str, batch: int) -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    import yaml

    from thresher.flows import execute, pipeline
    from thresher.flows.config import build_definition, default_config_text

    timer = time.thread_time if clock == "cpu" else time.perf_counter
    profiles: list[cProfile.Profile] = []
    spans: list[tuple[str, int, float, float, float]] = []
    lock = threading.Lock()
    original = execute.BatchRunner.run

    def run(self, job):
        p = cProfile.Profile(timer)
        t0, c0 = time.perf_counter(), time.thread_time()
        p.enable()
        try:
            return original(self, job)
        finally:
            p.disable()
            with lock:
                profiles.append(p)
                spans.append((job.part, len(job.docs), t0, time.perf_counter(), time.thread_time() - c0))

    execute.BatchRunner.run = run
    data = yaml.safe_load(default_config_text())
    data["runner"] = {"kind": kind, "workers": workers, "batch_size": batch}
    main = cProfile.Profile(timer)
    t0 = time.perf_counter()
    main.enable()
    manifest = pipeline.run(build_definition(data, "profile"), drive, store, quiet=True)
    main.disable()
    wall = time.perf_counter() - t0
    text = io.StringIO()
    stats = pstats.Stats(profiles[0], stream=text)
    for p in profiles[1:]:
        stats.add(p)
    stats.sort_stats("tottime").print_stats(45)
    stats.sort_stats("cumulative").print_stats(60)
    text.write("\n==== main thread\n")
    pstats.Stats(main, stream=text).sort_stats("cumulative").print_stats(40)
    Path(out).write_text(text.getvalue())
    print(f"{kind}, {workers} workers, {clock} clock: {wall:.1f} s; flow time per part {manifest['timings']}; "
          f"step seconds {manifest['step_seconds']}")
    segments: dict[str, list] = {}
    for part, n, a, b, cpu in spans:
        s = segments.setdefault(part.split("-")[0], [0, 0, 0.0, 0.0])
        s[0] += 1
        s[1] += n
        s[2] += b - a
        s[3] += cpu
    for name, (batches, docs, seconds, cpu) in sorted(segments.items()):
        print(f"  segment {name}: {batches} batches, {docs} documents; batches' wall {seconds:.1f} s, parent thread "
              f"CPU {cpu:.1f} s ({seconds / batches * 1000:.0f} ms and {cpu / batches * 1000:.0f} ms per batch)")


if __name__ == "__main__":
    args = sys.argv[1:]
    if args[:1] == ["drive"]:
        _drive(args[1], int(args[2]), int(args[3]))
    elif args[:1] == ["run"]:
        _run(args[1], int(args[2]), args[3], args[4], args[5], args[6], int(args[7]) if len(args) > 7 else 8)
    else:
        print(__doc__)
        sys.exit(2)
