"""One worker against N threads, N processes and a local Dask cluster of N workers, on a
drive of a few large PDFs and many small files.

Threads are in the list because every document step runs in a warm worker process
(flows/segment.py), so even a thread pool runs the steps on several cores at once.

Knobs (environment): THRESHER_BENCH_SCALE_DOCUMENTS (small files, 1200),
THRESHER_BENCH_SCALE_LARGE (book-length PDFs, 6), THRESHER_BENCH_SCALE_BATCH (documents
per batch; the default runner's unless set).

Each configuration runs as its own `thresher run` process against one Prefect server
started here first (so no configuration pays for a server start), and is measured
the same way: wall time, peak memory of its whole process tree (polled with psutil),
and the time spent inside the steps as the run's manifest reports it.
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

from bench.drive import add_large_pdfs, make_drive
from bench.warm import start_prefect_server

SMALL_DOCUMENTS = int(os.environ.get("THRESHER_BENCH_SCALE_DOCUMENTS", "1200"))
LARGE_PDFS = int(os.environ.get("THRESHER_BENCH_SCALE_LARGE", "6"))
# Documents per batch: the default runner's unless set (the figure the goal is about is
# the default runner's).
BATCH_SIZE = os.environ.get("THRESHER_BENCH_SCALE_BATCH")


def _tree_rss(pid: int, cpu: dict[int, float] | None = None, skip: frozenset[int] = frozenset()) -> int:
    """The process tree's resident memory now, without the processes in `skip` and
    theirs; `cpu`, if given, keeps each process's last seen CPU seconds (a process gone
    between two polls loses at most one poll's worth)."""
    import psutil

    try:
        proc = psutil.Process(pid)
        procs = [proc] + proc.children(recursive=True)
        for other in skip:
            gone = {p.pid for p in psutil.Process(other).children(recursive=True)} | {other}
            procs = [p for p in procs if p.pid not in gone]
    except psutil.NoSuchProcess:
        return 0
    total = 0
    for p in procs:
        try:
            total += p.memory_info().rss
            if cpu is not None:
                t = p.cpu_times()
                cpu[p.pid] = t.user + t.system
        except psutil.NoSuchProcess:
            pass
    return total


def _cpu_seconds(proc) -> float:
    import psutil

    try:
        t = psutil.Process(proc.pid).cpu_times()
        return t.user + t.system
    except (psutil.NoSuchProcess, AttributeError):
        return 0.0


def _measure(cmd: list[str], env: dict, server) -> tuple[float, int, dict, tuple[float, float], float, float]:
    """Wall time, peak memory of the process tree, the run's manifest, the one-minute
    load average before and after (the machine is shared: a figure means little without
    it), the CPU seconds of the run's process tree and of the Prefect server meanwhile."""
    load_before = os.getloadavg()[0]
    server_before = _cpu_seconds(server.server_process)
    cpu: dict[int, float] = {}
    peak = 0
    t = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    done = threading.Event()

    def poll() -> None:
        nonlocal peak
        while not done.is_set():
            peak = max(peak, _tree_rss(proc.pid, cpu))
            time.sleep(0.1)

    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    out, err = proc.communicate()
    wall = time.perf_counter() - t
    done.set()
    watcher.join()
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {err[-2000:]}")
    return (wall, peak, json.loads(out), (load_before, os.getloadavg()[0]), sum(cpu.values()),
            _cpu_seconds(server.server_process) - server_before)


def main() -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    import yaml

    from thresher.flows.config import default_config_text

    default = yaml.safe_load(default_config_text())["runner"]
    batch_size = int(BATCH_SIZE or default["batch_size"])
    workers = os.cpu_count() or 2
    server = start_prefect_server()
    env = dict(os.environ)
    env["PREFECT_API_URL"] = server.api_url
    thresher = str(Path(sys.executable).with_name("thresher"))
    try:
        with tempfile.TemporaryDirectory() as tmp:
            drive = make_drive(Path(tmp) / "drive", SMALL_DOCUMENTS)
            add_large_pdfs(drive, LARGE_PDFS)
            configs = {
                "1 worker (sequential)": {"kind": "sequential", "workers": 1},
                f"{workers} threads": {"kind": "threads", "workers": workers},
                f"{workers} processes": {"kind": "processes", "workers": workers},
                f"Dask, {workers} local workers": {"kind": "dask", "workers": workers},
            }
            results = {}
            for label, runner in configs.items():
                flow = Path(tmp) / f"{runner['kind']}.yaml"
                flow.write_text(json.dumps({"runner": {**runner, "batch_size": batch_size},
                                            "steps": _default_steps()}))
                store = Path(tmp) / f"store-{runner['kind']}"
                results[label] = _measure([thresher, "run", "--config", str(flow), "--source", str(drive),
                                           "--store", str(store), "--quiet", "--json"], env, server)
    finally:
        server.stop()
    base = next(iter(results.values()))[0]
    first = next(iter(results.values()))[2]
    first_cpu = next(iter(results.values()))[4] + next(iter(results.values()))[5]
    print(f"drive: {first['documents']['files']} files, {first['pages']} pages, {first['chunks']} chunks; "
          f"{workers} cores; batch size {batch_size}; default runner: {default['kind']}, "
          f"{default['workers']} workers")
    print(f"{'configuration':<28} {'wall s':>7} {'speed-up':>8} {'peak MB':>8} {'outside steps':>13} "
          f"{'load before/after':>17} {'CPU s run+server':>16}")
    for label, (wall, peak, m, load, cpu, server_cpu) in results.items():
        n = 1 if label.startswith("1 worker") else workers
        # Step time is summed over workers; spread over n of them it is the steps' share of wall time.
        outside = max(0.0, 1 - m["step_seconds"] / n / wall)
        print(f"{label:<28} {wall:7.2f} {base / wall:8.2f} {peak / 2**20:8.0f} {outside:13.0%} "
              f"{load[0]:8.1f}/{load[1]:.1f} {cpu:9.1f}+{server_cpu:.1f}")
    # What the CPU seconds allow on this many cores: a run needs at least its CPU seconds
    # spread over the cores, whatever else shares the machine.
    print("CPU seconds of the run's process tree and the Prefect server against one worker's: " + "; ".join(
        f"{label} {(r[4] + r[5]) / max(1e-9, first_cpu):.2f}x" for label, r in results.items()))
    # Where the flow's time went, per part of the run (the manifest's timings), side by side.
    parts = list(first["timings"])
    print("flow time per part, s: " + "; ".join(
        f"{label}: " + ", ".join(f"{k} {m['timings'].get(k, 0):.1f}" for k in parts)
        for label, (_, _, m, *_) in results.items()))
    # The document segments: the parts named after steps joined by "+" or a lone step
    # that is not a corpus step (plan, handoff and counts are not steps).
    segs = [k for k in parts if k not in ("plan", "handoff", "counts", "boilerplate", "dedup")]
    print("document segments (" + ", ".join(segs) + ") against one worker: " + "; ".join(
        f"{label} {sum(first['timings'][k] for k in segs) / max(1e-9, sum(m['timings'].get(k, 0) for k in segs)):.2f}x"
        for label, (_, _, m, *_) in results.items()))


def _default_steps() -> list:
    import yaml

    from thresher.flows.config import default_config_text

    return yaml.safe_load(default_config_text())["steps"]


if __name__ == "__main__":
    main()
