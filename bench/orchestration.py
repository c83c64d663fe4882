"""What Prefect costs thresher: fixed start-up of embedded mode and per-batch overhead.

Measured side by side in one process run:
  1. start-up: wall time of the first (empty) flow run in a fresh process, which
     starts Prefect's temporary server, against a second empty flow run;
  2. per batch: a flow submitting N no-op batch tasks against calling the same
     no-op N times in plain Python, so the difference is Prefect's per-task cost;
  3. the demo drive end to end, and the share of it spent inside the steps;
  4. the demo drive with nothing changed, run after run: embedded (each run starts
     its own temporary server) against runs pointed at a Prefect server that outlives
     them (PREFECT_API_URL, as `make prefect-server` gives), alternating, beside the
     floor of any run: starting Python and importing thresher's flow with Prefect.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench import REPO

CHILD = r"""
import json, sys, time
t0 = time.perf_counter()
from thresher.flows import runtime
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner
t_import = time.perf_counter() - t0

@task(cache_policy=NO_CACHE)
def noop(i):
    return i

@flow(task_runner=ThreadPoolTaskRunner(max_workers=2))
def many(n):
    futs = [noop.submit(i) for i in range(n)]
    return sum(f.result() for f in futs)

@flow(task_runner=ProcessPoolTaskRunner(max_workers=2))
def many_processes(n):
    futs = [noop.submit(i) for i in range(n)]
    return sum(f.result() for f in futs)

@flow
def empty():
    return 0

N = int(sys.argv[1])
t = time.perf_counter(); empty(); first = time.perf_counter() - t
t = time.perf_counter(); empty(); second = time.perf_counter() - t
t = time.perf_counter(); many(N); with_tasks = time.perf_counter() - t
t = time.perf_counter(); sum(noop.fn(i) for i in range(N)); plain = time.perf_counter() - t
from thresher.flows.pipeline import shared_api
with shared_api("processes"):
    t = time.perf_counter(); many_processes(N); with_processes = time.perf_counter() - t
print(json.dumps({"import": t_import, "first": first, "second": second, "with_tasks": with_tasks, "plain": plain,
                  "with_processes": with_processes}))
"""


def main() -> None:
    import json

    n = 200
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)
    with tempfile.TemporaryDirectory() as home:
        env["PREFECT_HOME"] = home  # a new database, as on a fresh machine
        out = subprocess.run([sys.executable, "-c", CHILD, str(n)], check=True, capture_output=True, text=True,
                             env=env, cwd=REPO)
    r = json.loads(out.stdout.strip().splitlines()[-1])
    per_task_ms = (r["with_tasks"] - r["second"] - r["plain"]) / n * 1000
    print(f"prefect import                 {r['import']:.2f} s")
    print(f"first flow run (server start)  {r['first']:.2f} s")
    print(f"second flow run                {r['second']:.2f} s   ratio first/second {r['first'] / r['second']:.1f}x")
    print(f"{n} batch tasks in one flow     {r['with_tasks']:.2f} s   -> {per_task_ms:.1f} ms per batch task (threads)")
    per_proc_ms = (r["with_processes"] - r["second"]) / n * 1000
    # Each figure is the difference of two flow runs: below 0.1 ms a task, threads' cost is
    # inside the noise of one flow run's fixed time, and a ratio to it means nothing.
    against = f"{per_proc_ms / per_task_ms:.1f}x threads" if per_task_ms >= 0.1 else \
        "threads' cost per task within the noise of one flow run"
    print(f"{n} tasks, 2-process pool       {r['with_processes']:.2f} s   -> {per_proc_ms:.1f} ms per task, the pool's "
          f"start included ({against})")

    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "store"
        env2 = dict(env)
        env2["PREFECT_HOME"] = str(Path(tmp) / "prefect")
        t = time.perf_counter()
        res = subprocess.run([str(Path(sys.executable).with_name("thresher")), "run", "--source",
                              str(REPO / "sample_inputs"), "--store", str(store), "--json", "--quiet"],
                             check=True, capture_output=True, text=True, env=env2, cwd=REPO)
        wall = time.perf_counter() - t
        m = json.loads(res.stdout)
        inside = m["step_seconds"]
        print(f"demo drive, fresh process       {wall:.2f} s wall; flow body {m['seconds']:.2f} s; "
              f"steps {inside:.2f} s (summed over workers; {inside / wall:.0%} of wall)")
        shutil.rmtree(store, ignore_errors=True)

    server_fast_path(env)


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def server_fast_path(env: dict, rounds: int = 3) -> dict:
    """Median wall times of a no-change run of the demo drive, embedded and against a
    running server, and of the imports alone, measured alternately in one run."""
    import statistics

    from thresher.flows.runtime import api_unreachable

    thresher = str(Path(sys.executable).with_name("thresher"))
    with tempfile.TemporaryDirectory() as tmp:
        port = _free_port()
        url = f"http://127.0.0.1:{port}/api"
        server_env = dict(env, PREFECT_HOME=str(Path(tmp) / "server"))
        server = subprocess.Popen([str(Path(sys.executable).with_name("prefect")), "server", "start", "--host",
                                   "127.0.0.1", "--port", str(port), "--no-ui"], env=server_env,
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            end = time.monotonic() + 120
            while api_unreachable(url, timeout=2) and time.monotonic() < end:
                time.sleep(0.5)
            run = [thresher, "run", "--source", str(REPO / "sample_inputs"), "--store", str(Path(tmp) / "store"),
                   "--quiet"]
            embedded_env = dict(env, PREFECT_HOME=str(Path(tmp) / "client"))
            served_env = dict(embedded_env, PREFECT_API_URL=url)
            subprocess.run(run, check=True, capture_output=True, env=served_env, cwd=REPO)  # the full run
            times: dict[str, list[float]] = {"imports": [], "embedded": [], "server": []}
            for _ in range(rounds):
                for label, cmd, e in (("imports", [sys.executable, "-c", "import thresher.flows.pipeline"], env),
                                      ("embedded", run, embedded_env), ("server", run, served_env)):
                    t = time.perf_counter()
                    subprocess.run(cmd, check=True, capture_output=True, env=e, cwd=REPO)
                    times[label].append(time.perf_counter() - t)
        finally:
            server.terminate()
            server.wait(timeout=60)
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"demo drive, nothing changed (median of {rounds}, alternating; load average "
          f"{os.getloadavg()[0]:.1f}):")
    print(f"  embedded (a temporary server each run)  {med['embedded']:.2f} s wall")
    print(f"  PREFECT_API_URL to a running server     {med['server']:.2f} s wall   "
          f"({med['embedded'] / med['server']:.1f}x faster)")
    print(f"  floor: Python and thresher's imports    {med['imports']:.2f} s wall   "
          f"({med['imports'] / med['server']:.0%} of the served run)")
    return med
