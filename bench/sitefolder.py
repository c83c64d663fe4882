"""The HTML boilerplate step on one large site folder, old way against new.

A drive with one export folder of N generated HTML pages (THRESHER_BENCH_SITE_PAGES,
default 400) sharing a menu, a notice and a footer, plus a smaller folder. Two stores
of the same drive: one run with the boilerplate step as a plain corpus step (what it
was before issue 11 item 4: every live page of a changed site folder loaded in full and
decided again; `PLAIN_BOILERPLATE` below, the same decisions), one with the shipped
incremental page step (stored block fingerprints; only changed pages read). Each round
edits one page of the export folder and runs both stores, taking turns which goes
first; printed per way: pages read in full, rows written, the corpus step's wall and
process CPU time (pyarrow reads in threads of its own), and in a last round its peak traced memory (tracemalloc, Python
allocations only, in a round of its own because tracing slows it).
"""

from __future__ import annotations

import os
import random
import statistics
import tempfile
import time
import tracemalloc
from pathlib import Path

from bench.drive import _paragraph
from thresher.steps.boilerplate import BOILERPLATE
from thresher.steps.spec import StepSpec

# The old convention: a plain corpus step (every page of a changed group, loaded whole).
PLAIN_BOILERPLATE = StepSpec(**{f: getattr(BOILERPLATE, f) for f in StepSpec.__dataclass_fields__})

MENU = ("<div class='menu'><ul><li><a href='index.html'>Home</a></li><li><a href='hours.html'>Opening hours</a>"
        "</li><li><a href='events.html'>Events</a></li><li><a href='join.html'>Join the library</a></li></ul></div>")
NOTICE = "<p>Quillfern staff intranet: for staff and volunteers only. Page {n} of the export.</p>"
FOOTER = "<p>Pages kept by the volunteers' web group; send corrections to the branch desk.</p>"


def _page(rng: random.Random, n: int, edit: int = 0) -> str:
    own = "".join(f"<p>{_paragraph(rng, rng.randint(2, 6))}</p>" for _ in range(3))
    extra = f"<p>Edited in round {edit}: the notes above were checked again.</p>" if edit else ""
    return (f"<html><head><title>Export page {n}</title></head><body>{MENU}<h1>Export page {n}</h1>{own}{extra}"
            f"{NOTICE.format(n=n)}{FOOTER}</body></html>")


def make_site_drive(root: Path, pages: int) -> Path:
    rng = random.Random(11)
    (root / "export").mkdir(parents=True)
    (root / "handbook").mkdir()
    for n in range(pages):
        (root / "export" / f"page-{n:05d}.html").write_text(_page(rng, n), encoding="utf-8")
    for n in range(20):
        (root / "handbook" / f"part-{n:02d}.html").write_text(_page(rng, n), encoding="utf-8")
    return root


class _Recorder:
    """Wraps the flow's corpus-step call: its wall and process CPU time, pages read, rows
    written, and (when asked) the peak of traced memory during the call."""

    def __init__(self) -> None:
        from thresher.flows import pipeline

        self.pipeline = pipeline
        self.inner = pipeline.run_corpus_step
        self.trace = False
        self.last: dict = {}
        pipeline.run_corpus_step = self._call

    def _call(self, definition, *args, **kwargs):
        if self.trace:
            tracemalloc.start()
            tracemalloc.reset_peak()
        c, w = time.process_time(), time.perf_counter()
        res = self.inner(definition, *args, **kwargs)
        wall, cpu = time.perf_counter() - w, time.process_time() - c
        peak = tracemalloc.get_traced_memory()[1] if self.trace else None
        if self.trace:
            tracemalloc.stop()
        if res.stage == "boilerplate":
            self.last = {"read": res.read, "rows": res.rows_written, "wall": wall, "cpu": cpu, "peak": peak}
        return res


def main() -> None:
    from thresher.flows import runtime  # noqa: F401

    import yaml
    from bench.warm import start_prefect

    from thresher.flows import pipeline
    from thresher.flows.config import build_definition, default_config_text
    from thresher.flows.store import Store

    start_prefect()
    pages = int(os.environ.get("THRESHER_BENCH_SITE_PAGES", "400"))
    rounds = int(os.environ.get("THRESHER_BENCH_SITE_ROUNDS", "3"))
    data = yaml.safe_load(default_config_text())
    new_def = build_definition(data, "bench")
    old_data = yaml.safe_load(default_config_text())
    for s in old_data["steps"]:
        if s["step"] == "boilerplate":
            s["step"] = "bench.sitefolder:PLAIN_BOILERPLATE"
    old_def = build_definition(old_data, "bench")
    ways = {"old (plain step)": old_def, "new (fingerprints)": new_def}
    rec = _Recorder()
    with tempfile.TemporaryDirectory() as tmp:
        drive = make_site_drive(Path(tmp) / "drive", pages)
        stores = {w: Path(tmp) / f"store-{i}" for i, w in enumerate(ways)}
        results: dict[str, list[dict]] = {w: [] for w in ways}
        full: dict[str, dict] = {}
        for w, d in ways.items():
            pipeline.run(d, str(drive), str(stores[w]), workers=1, quiet=True)
            full[w] = rec.last
        rng = random.Random(5)
        for r in range(rounds + 1):
            n = rng.randrange(pages)
            (drive / "export" / f"page-{n:05d}.html").write_text(_page(random.Random(n), n, edit=r + 1),
                                                                  encoding="utf-8")
            rec.trace = r == rounds  # the last round measures memory only
            order = list(ways) if r % 2 == 0 else list(reversed(ways))
            for w in order:
                pipeline.run(ways[w], str(drive), str(stores[w]), workers=1, quiet=True)
                results[w].append(rec.last)
        texts = {w: sorted((r["source_path"], r["text"]) for r in Store(stores[w]).handoff().to_pylist())
                 for w in ways}
    same = texts["old (plain step)"] == texts["new (fingerprints)"]
    print(f"one site folder of {pages} HTML pages (plus 20 in another); {rounds} rounds of one page edited, "
          f"both ways in turn; load {os.getloadavg()[0]:.1f}; hand-off texts equal: {same}")
    print(f"{'':30}{'pages read':>11}{'rows written':>14}{'wall s':>9}{'CPU s':>8}{'peak MB':>9}")
    for w in ways:
        f = full[w]
        print(f"{w + ', first run':30}{f['read']:>11}{f['rows']:>14}{f['wall']:>9.3f}{f['cpu']:>8.3f}{'':>9}")
    for w in ways:
        timed, traced = results[w][:rounds], results[w][rounds]
        print(f"{w + ', one page edited':30}{statistics.median(x['read'] for x in timed):>11.0f}"
              f"{statistics.median(x['rows'] for x in timed):>14.0f}"
              f"{statistics.median(x['wall'] for x in timed):>9.3f}{statistics.median(x['cpu'] for x in timed):>8.3f}"
              f"{traced['peak'] / 2**20:>9.1f}")
    old, new = results["old (plain step)"][:rounds], results["new (fingerprints)"][:rounds]
    print(f"new / old, one page edited (medians): wall "
          f"{statistics.median(x['wall'] for x in new) / statistics.median(x['wall'] for x in old):.3f}, CPU "
          f"{statistics.median(x['cpu'] for x in new) / statistics.median(x['cpu'] for x in old):.3f}, peak memory "
          f"{results['new (fingerprints)'][rounds]['peak'] / results['old (plain step)'][rounds]['peak']:.3f}")


if __name__ == "__main__":
    main()
