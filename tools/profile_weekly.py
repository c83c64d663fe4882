#!/usr/bin/env python3
"""Where a weekly run's time goes: one bench drive and store built once, then the
no-change run and the 1%-changed run profiled in this process (cProfile on the wall
clock and on each thread's CPU clock; the task threads' batches and corpus steps
profiled each on its own and merged in), against Prefect's temporary server, warm,
as bench/goals.py's weekly_runs measures them.

Usage (from the repo, with the venv's python):
  python tools/profile_weekly.py OUT [DOCUMENTS] [ROUNDS] [--figures]

--figures: no profiles, only the figures (for measuring two versions side by side:
run this alternately with each version's code first on PYTHONPATH).

Prints each run's wall and CPU seconds beside the full run's, the Prefect task runs
each run created, and writes the profiles (by own time and by cumulative time, wall
and CPU) to OUT/. ROUNDS (default 3) repeats each measured run: a no-change run, then
a 1%-changed run (a fresh 1 % of the notes edited each round); each is run once
without the profiler (the figure) and once under it (the profile) per clock.
"""

from __future__ import annotations

import cProfile
import io
import os
import pstats
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


REPO = str(Path(__file__).resolve().parents[1])


class _Timed(cProfile.Profile):
    def __init__(self, timer) -> None:
        super().__init__(timer)
        self.timer = timer


def _stats(prof: cProfile.Profile, extra: list[cProfile.Profile], out: Path, name: str) -> None:
    def merged(stream):
        st = pstats.Stats(prof, stream=stream)
        for p in extra:
            st.add(p)
        return st

    merged(None).dump_stats(out / f"{name}.prof")
    for order in ("tottime", "cumulative"):
        buf = io.StringIO()
        merged(buf).sort_stats(order).print_stats(60)
        (out / f"{name}-{order}.txt").write_text(buf.getvalue())
    buf = io.StringIO()  # thresher's own functions only, by cumulative time
    merged(buf).sort_stats("cumulative").print_stats(f"{REPO}/(flows|steps)/")
    (out / f"{name}-ours.txt").write_text(buf.getvalue())


class _Threads:
    """cProfile profiles one thread; the batches and corpus steps run in the task
    runner's threads, so each call of theirs gets a profile of its own, merged later."""

    def __init__(self) -> None:
        self.clock = None
        self.profiles: list[cProfile.Profile] = []
        self.lock = threading.Lock()

    def wrap(self, fn):
        def run(*args, **kwargs):
            if self.clock is None:
                return fn(*args, **kwargs)
            p = cProfile.Profile(self.clock)
            p.enable()
            try:
                return fn(*args, **kwargs)
            finally:
                p.disable()
                with self.lock:
                    self.profiles.append(p)
        return run


def prefect_floor(times: int = 7) -> None:
    """Prefect's own cost per run on this server, as thresher's flow is set up (same
    task runner, same settings and client context): an empty flow run; with one task run; with the two
    summary artifacts a run publishes. Medians of `times` runs each."""
    import statistics

    from prefect import flow, task
    from prefect.artifacts import create_markdown_artifact, create_table_artifact
    from prefect.cache_policies import NO_CACHE
    from prefect.task_runners import ThreadPoolTaskRunner

    from thresher.flows.runtime import run_overrides

    try:
        from thresher.flows.runtime import client_context, run_settings
    except ImportError:  # a version before them: as its run() did
        from contextlib import nullcontext

        from prefect.settings import temporary_settings

        def run_settings(overrides):
            return temporary_settings(updates=overrides)

        client_context = nullcontext

    @task(cache_policy=NO_CACHE)
    def one() -> int:
        return 1

    @flow(persist_result=False, task_runner=ThreadPoolTaskRunner(max_workers=2))
    def empty(tasks: int, artifacts: bool) -> int:
        for _ in range(tasks):
            one.submit().result()
        if artifacts:
            create_table_artifact(key="floor-table", table=[{"a": i, "b": str(i)} for i in range(300)])
            create_markdown_artifact(key="floor-summary", markdown="# floor")
        return 0

    for label, tasks, artifacts in (("empty flow run", 0, False), ("with one task run", 1, False),
                                    ("with five task runs", 5, False), ("with two artifacts", 0, True)):
        walls, cpus = [], []
        with run_settings(run_overrides()):
            for _ in range(times):
                t, c = time.perf_counter(), time.process_time()
                with client_context():  # as run() enters it for each run
                    empty(tasks, artifacts)
                walls.append(time.perf_counter() - t)
                cpus.append(time.process_time() - c)
        print(f"Prefect alone, {label}: {statistics.median(walls):.3f} s wall, {statistics.median(cpus):.3f} s CPU "
              f"(medians of {times})", flush=True)


def main(out: Path, documents: int = 300, rounds: int = 3, figures: bool = False) -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    from prefect import flow

    from bench.drive import change_files, make_drive
    from thresher.flows import execute, pipeline
    from thresher.flows.config import load_definition

    out.mkdir(parents=True, exist_ok=True)
    threads = _Threads()
    execute.BatchRunner.run = threads.wrap(execute.BatchRunner.run)
    pipeline.run_corpus_step = threads.wrap(pipeline.run_corpus_step)

    @flow
    def warm_up() -> int:
        return 0

    warm_up()
    prefect_floor()
    definition = load_definition()
    with tempfile.TemporaryDirectory() as td:
        drive = make_drive(Path(td) / "drive", documents)
        store = Path(td) / "store"

        def timed(prof: cProfile.Profile | None = None) -> tuple[float, float, dict]:
            t, c = time.perf_counter(), time.process_time()
            threads.profiles = []
            if prof:
                threads.clock = prof.timer
                prof.enable()
            m = pipeline.run(definition, str(drive), str(store), quiet=True)
            if prof:
                prof.disable()
                threads.clock = None

            return time.perf_counter() - t, time.process_time() - c, m

        full, full_cpu, _ = timed()
        import thresher.flows

        print(f"code from {thresher.flows.__path__[0]}")
        print(f"load average {os.getloadavg()[0]:.2f}; full run {full:.2f} s wall, {full_cpu:.2f} s CPU", flush=True)
        seed = 11
        if figures:  # ROUNDS of each run, then medians
            import statistics

            from prefect.task_runners import ThreadPoolTaskRunner

            submitted = [0]  # task runs the run's flow submitted (the default runner's)
            submit = ThreadPoolTaskRunner.submit

            def counted(self, *args, **kwargs):
                submitted[0] += 1
                return submit(self, *args, **kwargs)

            ThreadPoolTaskRunner.submit = counted

            got: dict[str, list[tuple[float, float]]] = {"same": [], "changed": []}
            for r in range(rounds):
                for label in ("same", "changed"):
                    if label == "changed":
                        seed += 1
                        change_files(drive, 0.01, seed=seed)
                    submitted[0] = 0
                    wall, cpu, _ = timed()
                    got[label].append((wall, cpu, submitted[0]))
            for label, runs in got.items():
                wall = statistics.median(r[0] for r in runs)
                cpu = statistics.median(r[1] for r in runs)
                tasks = statistics.median(r[2] for r in runs)
                print(f"{'nothing changed' if label == 'same' else '1% changed'}, median of {len(runs)}: "
                      f"{wall:.3f} s wall ({wall / full:.1%} of the full run), {cpu:.3f} s CPU "
                      f"({cpu / full_cpu:.1%}), {tasks:g} task runs; load {os.getloadavg()[0]:.2f}", flush=True)
            return
        for r in range(rounds):
            for label in ("same", "changed"):
                for clock in ("plain", "wall", "cpu"):
                    if label == "changed":
                        seed += 1
                        n = len(change_files(drive, 0.01, seed=seed))
                    prof = None if clock == "plain" else _Timed(
                        time.perf_counter if clock == "wall" else time.thread_time)
                    wall, cpu, m = timed(prof)
                    if prof is not None:
                        _stats(prof, threads.profiles, out, f"{label}-{clock}-r{r}")
                    else:
                        what = "nothing changed" if label == "same" else f"{n} files changed"
                        print(f"round {r} {what}: {wall:.3f} s wall ({wall / full:.1%}), {cpu:.3f} s CPU "
                              f"({cpu / full_cpu:.1%}); timings {m['timings']}; load {os.getloadavg()[0]:.2f}",
                              flush=True)

if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if a != "--figures"]
    main(Path(args[0]), *(int(a) for a in args[1:]), figures="--figures" in sys.argv)
