"""A store that has seen many runs: reading one document's trail, before and after
compaction, after 1, 10 and 100 runs that each change 1 % of the documents.

The runs are written the way a run writes (one part file per batch per stage, a
ledger per part, a manifest) with synthetic rows, so 100 runs take seconds rather
than hours of extraction; what is measured is the store's read path, which does not
care where the rows came from. Figures: median time of `Store.current` for one
document at every stage (what `thresher trail` reads) by a reader with nothing
cached, as a new `thresher trail` process is, and part files on disk.
"""

from __future__ import annotations

import random
import statistics
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

from thresher.flows.housekeeping import compact
from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.flows.store import Store, forget_cached_ledgers
from thresher.steps.units import Block, Page

DOCS = 2000
PAGES = 4
BATCH = 32
STAGES = ["extract", "clean"]
CHANGED = 0.01
CHECKPOINTS = (1, 10, 100)


def _table(stage: str, run_id: str, docs: list[str], version: int):
    rows = []
    for d in docs:
        ctx = RowContext(run_id, d, f"{d}.txt", stage, "1", "d1", "pages", None,
                         datetime(2026, 1, 1, tzinfo=timezone.utc), 1.0, {})
        rows += [to_row(ctx, Page(locator=f"page/{p + 1}", page=p + 1,
                                  blocks=[Block("paragraph", f"{d} page {p} version {version} " * 20)]))
                 for p in range(PAGES)]
    return rows_to_table(stage, "pages", rows)


def _run(store: Store, seq: int, docs: list[str], version: int) -> None:
    run_id = f"r{seq:04d}"
    for stage in STAGES:
        for b in range(0, len(docs), BATCH):
            batch = docs[b:b + BATCH]
            store.write_stage_part(stage, run_id, f"b{b:05d}", _table(stage, run_id, batch, version),
                                   [(d, "document") for d in batch])
    store.commit(run_id, {"run_id": run_id, "sequence": seq, "publish": {},
                          "definition": {"steps": [{"name": s, "unit": "pages"} for s in STAGES]}})


def _trail_ms(root: Path, probes: list[str]) -> float:
    """Median over the probe documents (after one warm-up read; best of 3 rounds,
    since the machine may be shared)."""
    Store(root).current(STAGES[0], "pages", probes[:1])
    return min(_round(root, probes) for _ in range(3))


def _round(root: Path, probes: list[str]) -> float:
    times = []
    for d in probes:
        forget_cached_ledgers()  # as a new `thresher trail` process starts: nothing cached
        store = Store(root)  # a fresh reader, as `thresher trail` is
        t0 = time.perf_counter()
        for stage in STAGES:
            assert store.current(stage, "pages", [d]).num_rows == PAGES
        times.append((time.perf_counter() - t0) * 1000)
    return statistics.median(times)


def _parts(root: Path) -> int:
    return sum(1 for _ in (root / "stages").rglob("part-*.parquet"))


def main() -> None:
    rng = random.Random(14)
    docs = [f"doc{i:05d}" for i in range(DOCS)]
    probes = rng.sample(docs, 15)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "store"
        store = Store(root)
        _run(store, 1, docs, 0)
        print(f"{DOCS} documents x {PAGES} pages, {len(STAGES)} stages; each later run changes {CHANGED:.0%}")
        print(f"{'runs':>5} {'parts':>7} {'trail ms':>9} | {'compacted parts':>15} {'trail ms':>9}")
        base = None
        done = 1
        for target in CHECKPOINTS:
            while done < target:
                done += 1
                _run(store, done, rng.sample(docs, int(DOCS * CHANGED)), done)
            raw = _trail_ms(root, probes)
            copy = Path(tmp) / f"compacted-{target}"
            import shutil

            shutil.copytree(root, copy)
            compact(Store(copy))
            packed = _trail_ms(copy, probes)
            base = base or (raw, packed)
            print(f"{target:>5} {_parts(root):>7} {raw:>9.1f} | {_parts(copy):>15} {packed:>9.1f}"
                  f"   ratio to 1 run: {raw / base[0]:.2f}x raw, {packed / base[1]:.2f}x compacted")
            shutil.rmtree(copy)


if __name__ == "__main__":
    main()
