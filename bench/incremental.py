"""Weekly runs: a full run, a run with no changes, and a run with 1% of files changed;
then the hand-off's streamed copy on a 200,000-chunk synthetic hand-off.

All three run in one process against the same Prefect server (started before the
first timing by an empty flow), so the ratios compare the work, not server start-up.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

from bench.drive import change_files, make_drive

DOCUMENTS = 300


class _StoreTime:
    """The store's own I/O in this process, timed where it touches files: Parquet and
    JSON writes (each through Store._atomic_write), Parquet reads of stage parts,
    published files and manifests, checksums, and folder listings (the ledgers' and
    runs' lookups). Leaf calls only, so nothing is counted twice; summed over threads
    (batches run in two), so it can exceed the wall time of a phase. Reads a warm
    worker makes in its own process (a segment's inputs after a corpus step) are not
    in it."""

    WRITES = ("_atomic_write",)
    READS = ("_read", "read_table", "table_and_record", "file_record", "_list", "read_json")

    def __init__(self) -> None:
        import threading

        from thresher.flows.store import Store

        self.lock = threading.Lock()
        self.seconds = {"writes": 0.0, "reads": 0.0}
        for kind, names in (("writes", self.WRITES), ("reads", self.READS)):
            for name in names:
                setattr(Store, name, self._timed(getattr(Store, name), kind))

    def _timed(self, fn, kind: str):
        def run(*args, **kwargs):
            t = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                with self.lock:
                    self.seconds[kind] += time.perf_counter() - t
        return run

    def take(self) -> dict[str, float]:
        with self.lock:
            out, self.seconds = self.seconds, {"writes": 0.0, "reads": 0.0}
        return out


def _handoff_side_by_side(definition, store_dir: Path, run_id: str, rounds: int = 5) -> dict[str, tuple]:
    """The hand-off of the run `run_id` (the latest) built again into a scratch folder,
    copied forward (only that run's written documents read from the stages) and rebuilt
    from every stage, alternating: medians of CPU and wall time."""
    import statistics

    from thresher.flows.access import document_access
    from thresher.flows.handoff import build_handoff, handoff_basis
    from thresher.flows.plan import live_documents
    from thresher.flows.store import Store

    store = Store(store_dir)
    catalog = store.catalog().to_pylist()
    _, live, copies = live_documents(catalog, {r.run_id: r.sequence for r in store.runs()}, store.next_sequence(),
                                     definition.model.source)
    access = document_access(catalog, definition.model.access)
    times: dict[str, list[tuple[float, float]]] = {"copied forward": [], "rebuilt": []}
    for _ in range(rounds):
        for way in times:
            previous = {d: live[d][1] for d in live} if way == "copied forward" else None
            c, w = time.process_time(), time.perf_counter()
            result = build_handoff(definition, store, run_id, live, access, "bench-scratch/chunks.parquet",
                                   "bench-scratch/digests.parquet", "bench-scratch/changes.parquet",
                                   basis=handoff_basis(definition), copies=copies, previous_live=previous)
            times[way].append((time.process_time() - c, time.perf_counter() - w))
            assert (result.mode == "rebuilt") == (way == "rebuilt"), result.mode
    store.delete_dir("bench-scratch")
    return {way: (statistics.median(c for c, _ in t), statistics.median(w for _, w in t)) for way, t in times.items()}


def main() -> None:
    from thresher.flows import runtime  # noqa: F401

    from bench.warm import start_prefect

    from thresher.flows import pipeline
    from thresher.flows.config import load_definition

    start_prefect()
    definition = load_definition()
    with tempfile.TemporaryDirectory() as tmp:
        drive = make_drive(Path(tmp) / "drive", DOCUMENTS)
        store = Path(tmp) / "store"
        n_files = sum(1 for p in drive.rglob("*") if p.is_file())

        store_time = _StoreTime()
        io: dict[str, dict[str, float]] = {}

        def timed(name: str) -> tuple[float, dict]:
            store_time.take()
            t = time.perf_counter()
            m = pipeline.run(definition, str(drive), str(store), quiet=True)
            io[name] = store_time.take()
            return time.perf_counter() - t, m

        full, m_full = timed("full run")
        same, m_same = timed("no changes")
        changed = change_files(drive, 0.01)
        one, m_one = timed("1% changed")
        handoff_ways = _handoff_side_by_side(definition, store, m_one["run_id"])
    print(f"drive: {n_files} files ({m_full['documents']['distinct']} distinct documents), "
          f"{m_full['pages']} pages, {m_full['chunks']} chunks")
    print(f"full run             {full:7.2f} s   1.00")
    print(f"no changes           {same:7.2f} s   {same / full:.3f} of full  "
          f"({m_same['documents']['processed']} processed, {m_same['changes']['upsert']} upserts)")
    print(f"1% changed ({len(changed)} files) {one:7.2f} s   {one / full:.3f} of full  "
          f"({m_one['documents']['processed']} processed, {m_one['changes']['upsert']} upserts, "
          f"{m_one['changes']['delete']} deletes)")
    # Where the time of the short runs goes: the run body's parts (the manifest's
    # timings), and what lies outside the body (Prefect's flow start and end, the
    # commit, the run's artifacts, delivery).
    for name, secs, m in (("no changes", same, m_same), ("1% changed", one, m_one)):
        parts = ", ".join(f"{k} {v:.2f}" for k, v in m["timings"].items())
        print(f"  {name}: {parts}; run body {m['seconds']:.2f} s, outside it {secs - m['seconds']:.2f} s; "
              f"hand-off {m['handoff']}")
    # The store's own share: its Parquet and JSON writes and its reads and listings,
    # in this process (_StoreTime), against each run's wall time.
    for (name, secs) in (("full run", full), ("no changes", same), ("1% changed", one)):
        w, r = io[name]["writes"], io[name]["reads"]
        print(f"  store I/O in the {name}: writes {w:.3f} s, reads and listings {r:.3f} s "
              f"({(w + r) / secs:.0%} of its wall time; summed over threads, workers' own reads not in it)")
    print("  the 1%-changed run's hand-off made again both ways on its store, alternating, median of 5 "
          "(process CPU time, then wall):")
    for way, (cpu, wall) in handoff_ways.items():
        print(f"    {way:<14} {cpu:6.3f} s CPU  {wall:6.3f} s wall")
    # What copying the hand-off forward costs on a large one (1 % of its documents
    # removed), beside a plain pyarrow copy of the same file.
    from bench.access import rewrite_cost

    rewrite_cost(removed_share=0.01)
