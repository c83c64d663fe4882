"""The throughput goals in one table: each figure beside its anchor, measured in this run.

Every figure is measured here, now, on this machine; the anchors (PDFium's own text
layer, pdfplumber's `extract_text`, tiktoken alone, one worker, a full run) are
measured in the same run, so the ratios hold on a busy machine where the seconds do
not. Corpora:
  - PDFs: the documentation PDFs Debian packages install (bench.extract's base PDFs
    and its ruled-table PDFs: FHS, the CRC paper, the Debian FAQ, the installation
    guide), those present on this machine;
  - text: Debian's licence and copyright texts (bench.chunking's corpus), TEXT_BYTES;
  - the weekly runs: the 300-document bench drive (bench.drive), one file in a hundred
    edited for the changed run;
  - the fixed start: the demo drive, nothing changed, embedded and served.
Takes about five minutes on 2 cores. `make bench` runs it first.
"""

from __future__ import annotations

import cProfile
import json
import os
import pstats
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench import REPO
from bench.drive import change_files, make_drive
from bench.extract import BASE_PDFS, RULED_PDFS, _plain, read_pdfium, read_pdfplumber, read_thresher
from bench.warm import start_prefect, start_prefect_server

TEXT_BYTES = 1_000_000
WEEK_DOCUMENTS = 300
ROWS: list[tuple[str, str, str, str]] = []  # figure, measured, anchor (same run), goal


def row(figure: str, measured: str, anchor: str, goal: str) -> None:
    ROWS.append((figure, measured, anchor, goal))
    print(f"  {figure}: {measured}  [{anchor}]  goal {goal}", flush=True)


def debian_pdfs(into: Path) -> list[Path]:
    return [_plain(p, into) for p in BASE_PDFS + RULED_PDFS if Path(p).exists()]


def pdf_drive(paths: list[Path], tmp: Path) -> Path:
    """A drive folder holding a copy of each PDF, for whole-chain runs."""
    drive = tmp / "pdf-drive"
    drive.mkdir()
    for p in paths:
        (drive / p.name).write_bytes(p.read_bytes())
    return drive


def _cpu(reader, paths: list[Path]) -> tuple[float, int]:
    t = time.process_time()
    pages = sum(len(reader(str(p))) for p in paths)
    return time.process_time() - t, pages


def pdf_reading(paths: list[Path]) -> int:
    """Direct calls in this process, CPU time per page; the pure-Python parsers' share."""
    read_thresher(str(paths[0]))  # imports and PDFium's library load, not timed
    read_pdfplumber(str(paths[0]))
    ours, pages = _cpu(read_thresher, paths)
    pdfium, _ = _cpu(read_pdfium, paths)
    plumber, _ = _cpu(read_pdfplumber, paths)
    row("PDF extraction, direct call", f"{ours / pages * 1000:.1f} ms CPU/page",
        f"PDFium text layer {pdfium / pages * 1000:.1f} ms ({ours / pdfium:.1f}x), pdfplumber extract_text "
        f"{plumber / pages * 1000:.1f} ms ({plumber / ours:.1f}x ours)", "<= 8 ms/page")
    prof = cProfile.Profile()
    prof.enable()
    for p in paths:
        read_thresher(str(p))
    prof.disable()
    stats = pstats.Stats(prof).stats
    total = sum(v[2] for v in stats.values())
    pure = sum(v[2] for k, v in stats.items() if "/pdfplumber/" in k[0] or "/pdfminer/" in k[0])
    row("pdfplumber and pdfminer code in that extraction", f"{pure / max(total, 1e-9):.1%} of its time",
        f"cProfile over the same {pages} pages", "none on the hot path")
    return pages


def _run(drive: Path, store: Path, runner: dict, env: dict, tmp: Path) -> tuple[float, dict]:
    import yaml

    from thresher.flows.config import default_config_text

    flow = tmp / f"flow-{runner['kind']}-{runner['workers']}.yaml"
    flow.write_text(json.dumps({"runner": runner, "steps": yaml.safe_load(default_config_text())["steps"]}))
    t = time.perf_counter()
    out = subprocess.run([str(Path(sys.executable).with_name("thresher")), "run", "--config", str(flow),
                          "--source", str(drive), "--store", str(store), "--quiet", "--json"],
                         env=env, capture_output=True, text=True, cwd=REPO)
    wall = time.perf_counter() - t
    if out.returncode != 0:
        raise RuntimeError(f"thresher run failed: {out.stderr[-2000:]}")
    return wall, json.loads(out.stdout)


def _extract_seconds(store: Path) -> float:
    """The extract step's own time in the run: each document's `document_ms` (wall time
    in its warm worker, once per document), summed. Not the extract segment's time: a
    PDF's text steps run in that segment too (pipeline.onward)."""
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    parts = sorted((store / "stages" / "extract").rglob("part-*.parquet"))
    return sum(pc.sum(pq.read_table(p, columns=["document_ms"]).column("document_ms")).as_py() or 0.0
               for p in parts) / 1000.0


def _worker_gaps(store: Path) -> tuple[float, float]:
    """In a one-worker run: the time from the first document's start to the last one's
    end during which the worker ran no step (from each stage's `started_at` and
    `document_ms`), and the longest such gap, in seconds."""
    import pyarrow.dataset as ds

    spans = []
    for stage in ("extract", "clean", "language", "split", "personal"):
        folder = store / "stages" / stage
        if not folder.is_dir():
            continue
        t = ds.dataset(str(folder), format="parquet").to_table(columns=["doc_id", "started_at", "document_ms"])
        t = t.group_by("doc_id").aggregate([("started_at", "min"), ("document_ms", "max")])
        for start, ms in zip(t.column("started_at_min").to_pylist(), t.column("document_ms_max").to_pylist()):
            spans.append((start.timestamp(), start.timestamp() + (ms or 0.0) / 1000))
    spans.sort()
    idle, longest, reach = 0.0, 0.0, spans[0][1] if spans else 0.0
    for start, end in spans[1:]:
        if start > reach:
            idle += start - reach
            longest = max(longest, start - reach)
        reach = max(reach, end)
    return idle, longest


def whole_chain(paths: list[Path], env: dict, tmp: Path, pdfium_pages_per_s: float) -> None:
    """The default chain over the Debian PDFs: one worker, then each runner with 2."""
    from thresher.flows.config import RunnerSection

    drive = pdf_drive(paths, tmp)
    default_kind = RunnerSection().kind
    results = {}
    for kind, workers in (("sequential", 1), (default_kind, 2), ("processes", 2), ("dask", 2)):
        if (kind, workers) in results:  # the default runner is also one of the others
            continue
        results[(kind, workers)] = _run(drive, tmp / f"store-{kind}-{workers}", {"kind": kind, "workers": workers},
                                        env, tmp)
    wall1, m1 = results[("sequential", 1)]
    pages = m1["pages"]
    extract_s = _extract_seconds(tmp / "store-sequential-1")
    row("PDF extraction inside a run (one worker)", f"{extract_s / max(pages, 1) * 1000:.1f} ms/page",
        f"the extract step's time per document in its worker, over {pages} pages; PDFium text layer "
        f"{1000 / pdfium_pages_per_s:.1f} ms/page", "<= 8 ms/page")
    idle, longest = _worker_gaps(tmp / "store-sequential-1")
    row("whole chain, one worker", f"{pages / m1['seconds']:.0f} pages/s",
        f"flow time {m1['seconds']:.1f} s; PDFium text layer alone {pdfium_pages_per_s:.0f} pages/s; "
        f"the worker idle {idle:.2f} s between documents (longest {longest:.2f} s)", ">= 80 pages/s")
    for (kind, workers), (wall, m) in results.items():
        if workers == 1:
            continue
        label = f"2 workers against 1, {kind}" + (" (the default runner)" if kind == default_kind else "")
        row(label, f"{m1['seconds'] / m['seconds']:.2f}x", f"flow time {m['seconds']:.1f} s against "
            f"{m1['seconds']:.1f} s", ">= 1.8x" if kind == default_kind else ">= 1.0x")


def text_steps() -> None:
    """clean + split + tokens against tiktoken alone on the same text, CPU time, best of 2."""
    from bench.chunking import cpu_figures, load_corpus

    f = cpu_figures(TEXT_BYTES, rounds=2)
    ours, alone = f["clean"] + f["split"] + f["tokens"], f["single"]
    mb = sum(len(t.encode("utf-8")) for _, t in load_corpus(TEXT_BYTES)) / 1e6
    row("clean + split + tokens", f"{ours / alone:.1f}x tiktoken's time",
        f"{mb:.1f} MB of licence text: {mb / ours:.2f} MB/s against tiktoken encode_ordinary {mb / alone:.2f} MB/s",
        "<= 1.5x")


WEEKS = 3  # weekly runs of each kind; the median is the figure


def weekly_runs(tmp: Path) -> None:
    """Full, then WEEKS with nothing changed and WEEKS with another 1 % of the files
    changed each time, in this process against one warm Prefect server. The median of
    each kind is the figure: about one run in 55 (5 of 280 here) waits 2-2.5 s for
    Prefect's client to retry its flow run's creation, which the temporary server's
    SQLite answered with 503 (busy), and one such run made a single-run figure
    meaningless (stop 34: 61 %)."""
    from statistics import median

    from thresher.flows import pipeline
    from thresher.flows.config import load_definition

    start_prefect()
    definition = load_definition()
    drive = make_drive(tmp / "week-drive", WEEK_DOCUMENTS)
    store = tmp / "week-store"

    def timed() -> float:
        t = time.perf_counter()
        pipeline.run(definition, str(drive), str(store), quiet=True)
        return time.perf_counter() - t

    full = timed()
    same = [timed() for _ in range(WEEKS)]
    changed, ones = [], []
    for k in range(WEEKS):
        changed.append(len(change_files(drive, 0.01, seed=11 + k)))
        ones.append(timed())

    def shown(runs: list[float]) -> str:
        return ", ".join(f"{r:.2f}" for r in runs)

    row("a run with nothing changed", f"{median(same) / full:.1%} of a full run",
        f"median of {shown(same)} s against {full:.2f} s, {WEEK_DOCUMENTS} documents", "<= 3 %")
    row(f"1 % of the files changed ({changed[0]})", f"{median(ones) / full:.1%} of a full run",
        f"median of {shown(ones)} s against {full:.2f} s", "<= 5 %")


def fixed_start(env: dict) -> None:
    from bench.orchestration import server_fast_path

    med = server_fast_path(env)
    row("thresher run, demo drive unchanged, served", f"{med['server']:.2f} s wall",
        f"embedded {med['embedded']:.2f} s; Python and imports alone {med['imports']:.2f} s", "< 3 s")


def main() -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

    print(f"load average at start {os.getloadavg()[0]:.1f}, {os.cpu_count()} cores", flush=True)
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        paths = debian_pdfs(tmp)
        if not paths:
            print("no Debian documentation PDFs here (make bench-deps installs some)")
            return
        pages = pdf_reading(paths)
        t = time.perf_counter()
        for p in paths:
            read_pdfium(str(p))
        pdfium_rate = pages / (time.perf_counter() - t)
        text_steps()
        weekly_runs(tmp)
        server = start_prefect_server()
        try:
            env = dict(os.environ, PREFECT_API_URL=server.api_url)
            whole_chain(paths, env, tmp, pdfium_rate)
        finally:
            server.stop()
        env = dict(os.environ)
        env.pop("PREFECT_API_URL", None)
        fixed_start(env)
    print(f"\nload average at end {os.getloadavg()[0]:.1f}")
    width = max(len(r[0]) for r in ROWS)
    print(f"{'figure':<{width}} | measured | anchor, same run | goal")
    for figure, measured, anchor, goal in ROWS:
        print(f"{figure:<{width}} | {measured} | {anchor} | {goal}")
    print("Not measured here: a real documentation drive (`python -m bench docdrive`: this machine's "
          "/usr/share/doc, three weeks); the hand-off's rewrite per million chunks (`python -m bench access`).")


if __name__ == "__main__":
    main()
