"""Each runner with 2 workers against one worker on the Debian documentation PDFs, with
where the CPU went: the run's own process (the parent: Prefect, recording rows, writing
parts), its child processes (warm workers, fork servers, pool or Dask workers), and the
Prefect server.

On a shared machine the wall-clock ratios move with the load; the CPU seconds hardly do.
The columns CPU parent, children and server are whole-run totals (imports and the
warm workers' preload included). "in flow" is the CPU all of them spent between the
flow's start and end (polled every 50 ms); spread over the cores it is a floor no
schedule can beat ("floor s"). "flow/floor" near 1 says the run is CPU-bound: the
2 workers are busy and only less CPU, not better parallelism, makes it faster.
"bound" is one worker's flow time over that floor: the most 2 workers could gain
while they spend that much CPU.

`python -m bench runners` (about two minutes); THRESHER_BENCH_RUNNERS=threads,processes
limits the runners, THRESHER_BENCH_ROUNDS=2 repeats the set in alternating order.

`python -m bench.runners --against TREE [--rounds N]`: another checkout (say a git
worktree of the commit before a change) and this one side by side, one worker and 2
threads each, alternately, N rounds (3 by default), against one Prefect server: flow
time, pages/s, 2 threads against one worker, the run's own CPU and the phases that do
not run on the workers (plan, dedup, tokens, hand-off, counts) as each manifest times
them. TREE's package is put first on the runs' import path (as bench.chunking does).
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


def _cpu_of(proc) -> float:
    t = proc.cpu_times()
    return t.user + t.system


class TreeCPU:
    """CPU seconds of a process and of its descendants, polled: a descendant that ends
    between two polls loses at most one poll's worth (warm workers live for the run)."""

    def __init__(self, pid: int, every: float = 0.05, server_pid: int | None = None):
        import psutil

        self.root = psutil.Process(pid)
        self.server = psutil.Process(server_pid) if server_pid else None
        self.own = 0.0
        self.children: dict[int, float] = {}
        self.every = every
        # (wall clock, own, children, server) at each poll: the CPU spent between the
        # flow's start and end is read off these (`during`).
        self.polls: list[tuple[float, float, float, float]] = []
        self._done = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()

    def _poll(self) -> None:
        import psutil

        while not self._done.is_set():
            try:
                self.own = _cpu_of(self.root)
                kids = self.root.children(recursive=True)
            except psutil.NoSuchProcess:
                return
            for k in kids:
                try:
                    self.children[k.pid] = _cpu_of(k)
                except psutil.NoSuchProcess:
                    pass
            server = _cpu_of(self.server) if self.server else 0.0
            self.polls.append((time.time(), self.own, sum(self.children.values()), server))
            self._done.wait(self.every)

    def stop(self) -> tuple[float, float]:
        self._done.set()
        self._thread.join()
        return self.own, sum(self.children.values())

    def during(self, start: float, end: float) -> tuple[float, float, float]:
        """CPU seconds of the process, its descendants and the server between two
        wall-clock times: from the last poll before `start` to the first after `end`
        (so up to one poll interval more on each side)."""
        before = [p for p in self.polls if p[0] <= start] or self.polls[:1]
        after = [p for p in self.polls if p[0] >= end] or self.polls[-1:]
        a, b = before[-1], after[0]
        return b[1] - a[1], b[2] - a[2], b[3] - a[3]


def first_document(store: Path, manifest: dict) -> float:
    """Seconds from the flow's start until a worker started on the first document (the
    earliest extract row's started_at, which the worker stamps), less the scan and plan:
    the time the first batch waited for its worker to be ready."""
    from datetime import datetime

    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    parts = sorted((store / "stages" / "extract").rglob("part-*.parquet"))
    first = min(pc.min(pq.read_table(p, columns=["started_at"]).column("started_at")).as_py() for p in parts)
    return (first - datetime.fromisoformat(manifest["started_at"])).total_seconds() - manifest["timings"]["plan"]


def run_once(drive: Path, store: Path, runner: dict, env: dict, tmp: Path, server_pid: int | None) -> dict:
    import psutil
    import yaml

    from thresher.flows.config import default_config_text

    flow = tmp / f"flow-{runner['kind']}-{runner['workers']}.yaml"
    flow.write_text(json.dumps({"runner": runner, "steps": yaml.safe_load(default_config_text())["steps"]}))
    server = psutil.Process(server_pid) if server_pid else None
    server_before = _cpu_of(server) if server else 0.0
    load = os.getloadavg()[0]
    t = time.perf_counter()
    proc = subprocess.Popen([str(Path(sys.executable).with_name("thresher")), "run", "--config", str(flow),
                             "--source", str(drive), "--store", str(store), "--quiet", "--json"],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO)
    tree = TreeCPU(proc.pid, server_pid=server_pid)
    out, err = proc.communicate()
    wall = time.perf_counter() - t
    parent, children = tree.stop()
    if proc.returncode != 0:
        raise RuntimeError(f"thresher run failed: {err[-2000:]}")
    m = json.loads(out)
    from datetime import datetime

    flow_cpu = tree.during(datetime.fromisoformat(m["started_at"]).timestamp(),
                           datetime.fromisoformat(m["finished_at"]).timestamp())
    return {"wall": wall, "flow": m["seconds"], "manifest": m, "parent": parent, "children": children,
            "flow_cpu": flow_cpu,
            "first": first_document(store, m),
            "server": (_cpu_of(server) - server_before) if server else 0.0, "load": (load, os.getloadavg()[0])}


def main() -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    from bench.goals import debian_pdfs, pdf_drive
    from bench.warm import start_prefect_server

    kinds = os.environ.get("THRESHER_BENCH_RUNNERS", "threads,processes,dask").split(",")
    rounds = int(os.environ.get("THRESHER_BENCH_ROUNDS", "1"))
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        paths = debian_pdfs(tmp)
        if not paths:
            print("no Debian documentation PDFs here (make bench-deps installs some)")
            return
        drive = pdf_drive(paths, tmp)
        server = start_prefect_server()
        env = dict(os.environ, PREFECT_API_URL=server.api_url)
        configs = [("sequential", 1)] + [(k, 2) for k in kinds]
        results: dict[tuple[str, int], list[dict]] = {c: [] for c in configs}
        try:
            for r in range(rounds):
                order = configs if r % 2 == 0 else [configs[0]] + configs[:0:-1]
                for kind, workers in order:
                    res = run_once(drive, tmp / f"store-{kind}-{workers}-{r}", {"kind": kind, "workers": workers},
                                   env, tmp, server.server_process.pid)
                    results[(kind, workers)].append(res)
                    print(f"  round {r + 1} {kind} x{workers}: flow {res['flow']:.2f} s, wall {res['wall']:.2f} s, "
                          f"CPU parent {res['parent']:.1f} s, children {res['children']:.1f} s, server "
                          f"{res['server']:.1f} s (in the flow {res['flow_cpu'][0]:.2f}, {res['flow_cpu'][1]:.2f}, "
                          f"{res['flow_cpu'][2]:.2f} s); first document after {res['first']:.2f} s; "
                          f"load {res['load'][0]:.1f} -> {res['load'][1]:.1f}", flush=True)
        finally:
            server.stop()
    one = results[("sequential", 1)]
    pages = one[0]["manifest"]["pages"]
    print(f"{len(paths)} PDFs, {pages} pages, {os.cpu_count()} cores")
    print(f"{'runner':<16} {'flow s':>7} {'speed-up':>8} {'CPU parent':>10} {'children':>8} {'server':>6} "
          f"{'CPU vs 1':>8} {'in flow':>7} {'floor s':>7} {'flow/floor':>10} {'bound':>5} {'load':>9}")
    for (kind, workers), runs in results.items():
        for r, res in enumerate(runs):
            base = one[r]
            c1 = base["parent"] + base["children"] + base["server"]
            c2 = res["parent"] + res["children"] + res["server"]
            # The CPU the run's processes and the server spent while the flow ran, over
            # the cores: no schedule can end the flow sooner. bound = one worker's flow
            # time over that floor, the most 2 workers could gain with that much CPU.
            inside = sum(res["flow_cpu"])
            floor = inside / min(workers, os.cpu_count() or 1)
            print(f"{kind + ' x' + str(workers):<16} {res['flow']:7.2f} {base['flow'] / res['flow']:8.2f} "
                  f"{res['parent']:10.1f} {res['children']:8.1f} {res['server']:6.1f} {c2 / c1:8.2f} "
                  f"{inside:7.2f} {floor:7.2f} {res['flow'] / floor:10.2f} {base['flow'] / floor:5.2f} "
                  f"{res['load'][0]:4.1f}-{res['load'][1]:.1f}")
    print("flow time per part, s: " + "; ".join(
        f"{k} x{w}: " + ", ".join(f"{p} {v:.2f}" for p, v in runs[0]["manifest"]["timings"].items())
        for (k, w), runs in results.items()))


PHASES = ("plan", "dedup", "tokens", "handoff", "counts")


def against(tree: str, rounds: int) -> None:
    """`tree` ("before") and this checkout ("after") alternately; see the module docstring."""
    import statistics

    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    from bench.goals import debian_pdfs, pdf_drive
    from bench.warm import start_prefect_server

    configs = [("sequential", 1), ("threads", 2)]
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        paths = debian_pdfs(tmp)
        if not paths:
            print("no Debian documentation PDFs here (make bench-deps installs some)")
            return
        drive = pdf_drive(paths, tmp)
        # thresher is the checkout's root directory: a link named thresher puts the other
        # tree's package first on the import path of the runs.
        (tmp / "before-path").mkdir()
        os.symlink(Path(tree).resolve(), tmp / "before-path" / "thresher")
        server = start_prefect_server()
        base = dict(os.environ, PREFECT_API_URL=server.api_url)
        envs = {"before": dict(base, PYTHONPATH=str(tmp / "before-path")), "after": base}
        results: dict[tuple[str, str], list[dict]] = {}
        n = 0
        try:
            for r in range(rounds):
                order = ["before", "after"] if r % 2 == 0 else ["after", "before"]
                for kind, workers in configs:
                    for label in order:
                        n += 1
                        res = run_once(drive, tmp / f"store-{n}", {"kind": kind, "workers": workers}, envs[label],
                                       tmp, server.server_process.pid)
                        results.setdefault((label, kind), []).append(res)
                        t = res["manifest"]["timings"]
                        print(f"  round {r + 1} {label} {kind} x{workers}: flow {res['flow']:.2f} s, CPU parent "
                              f"{res['parent']:.1f} s, children {res['children']:.1f} s; "
                              + ", ".join(f"{p} {t.get(p, 0.0):.2f}" for p in PHASES)
                              + f"; load {res['load'][0]:.1f} -> {res['load'][1]:.1f}", flush=True)
        finally:
            server.stop()
    pages = results[("after", "sequential")][0]["manifest"]["pages"]
    print(f"{len(paths)} PDFs, {pages} pages; medians of {rounds} rounds, before = {tree}")
    print(f"{'':<8} {'runner':<12} {'flow s':>7} {'pages/s':>7} {'x2 vs 1':>7} {'CPU parent':>10} "
          + " ".join(f"{p:>7}" for p in PHASES))
    for label in ("before", "after"):
        for kind, workers in configs:
            runs = results[(label, kind)]
            one = results[(label, "sequential")]
            flow = statistics.median(x["flow"] for x in runs)
            speed = statistics.median(o["flow"] / x["flow"] for o, x in zip(one, runs))
            print(f"{label:<8} {kind + ' x' + str(workers):<12} {flow:7.2f} {pages / flow:7.1f} {speed:7.2f} "
                  f"{statistics.median(x['parent'] for x in runs):10.2f} "
                  + " ".join(f"{statistics.median(x['manifest']['timings'].get(p, 0.0) for x in runs):7.2f}"
                             for p in PHASES))
    loads = [x["load"][i] for v in results.values() for x in v for i in (0, 1)]
    print(f"load average {min(loads):.1f}-{max(loads):.1f}")


if __name__ == "__main__":
    if "--against" in sys.argv:
        args = sys.argv[1:]
        rounds = int(args[args.index("--rounds") + 1]) if "--rounds" in args else 3
        against(args[args.index("--against") + 1], rounds)
    else:
        main()
