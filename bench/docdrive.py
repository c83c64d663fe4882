"""A real drive: the documentation this machine's Debian packages ship, three weeks of it.

The drive is built from /usr/share/doc (HTML, plain text, Markdown, PDFs, gzipped PDFs
unpacked, and every package's copyright file: many are identical or share long
licence texts, so deduplication has real work). Three runs in this process against
one Prefect server, as a weekly schedule does them: the first (everything), one with
nothing changed, and one with 1 % of the files edited (a paragraph appended to text,
Markdown, HTML and copyright files). Prints each run's wall time, the phases of the
flow (the manifest's `timings`), and the two weekly runs as shares of the first.
Then two more weeks (nothing changed; 1 % of the files edited again) each in a fresh
process, as a weekly schedule runs them, for their peak memory beside the first run's:
the run's own process (VmHWM, its peak started again before the first run) and its
process tree, workers included (psutil,
every 0.1 s; the Prefect server, a child of this process, left out).

What the drive holds depends on the packages installed (`make test` and `make bench`
install the ones the tests and benchmarks read), so compare runs on one machine only.
`python -m bench docdrive`.
"""

from __future__ import annotations

import gzip
import os
import random
import shutil
import tempfile
import time
from pathlib import Path

DOCS = Path("/usr/share/doc")
KEEP = (".html", ".htm", ".txt", ".md", ".pdf")
EDITABLE = (".html", ".htm", ".txt", ".md")
SHARE = 0.01
# Invented text for the edits (no source).
ADDED = "\n\nA note added this week: the rota for the quarterly review moves to the second Tuesday.\n"


def build(into: Path) -> int:
    """Copy the documentation files worth reading into `into`; their number."""
    n = 0
    for p in sorted(DOCS.rglob("*")):
        if p.is_symlink() or not p.is_file():
            continue
        rel = p.relative_to(DOCS)
        if p.name.endswith(".pdf.gz"):
            dest = into / rel.parent / p.name[:-3]
            data = gzip.decompress(p.read_bytes())
        elif p.name.lower().endswith(KEEP) or p.name == "copyright":
            dest, data = into / rel, None
        else:
            continue
        dest.parent.mkdir(parents=True, exist_ok=True)
        if data is None:
            shutil.copyfile(p, dest)
        else:
            dest.write_bytes(data)
        n += 1
    return n


def edit(drive: Path, share: float, seed: int = 7) -> list[Path]:
    """Append a paragraph to `share` of the drive's files (text kinds only), as a week would."""
    files = sorted(p for p in drive.rglob("*") if p.is_file())
    editable = [p for p in files if p.suffix.lower() in EDITABLE or p.name == "copyright"]
    chosen = random.Random(seed).sample(editable, max(1, round(len(files) * share)))
    for p in chosen:
        p.write_bytes(p.read_bytes() + ADDED.encode())
    return chosen


def main() -> None:
    from bench import peak_mb, reset_peak
    from bench.memory import TreePeak, measure
    from bench.warm import prefect_server

    from thresher.flows import pipeline
    from thresher.flows.config import load_definition

    if not DOCS.is_dir():
        print(f"no {DOCS} here")
        return

    print(f"load average at start {os.getloadavg()[0]:.1f}, {os.cpu_count()} cores", flush=True)
    with prefect_server() as server, tempfile.TemporaryDirectory() as td:
        drive, store = Path(td) / "drive", Path(td) / "store"
        files = build(drive)
        definition = load_definition()
        skip = frozenset({server.server_process.pid})
        walls: dict[str, float] = {}
        first_peaks = (0, 0)
        for week in ("first", "same", "edited"):
            label = {"first": "first run", "same": "nothing changed"}.get(week) \
                or f"{len(edit(drive, SHARE))} files changed ({SHARE:.0%})"
            if week == "first":
                reset_peak()  # `make bench` ran other benchmarks in this process before
            t = time.perf_counter()
            with TreePeak(os.getpid(), skip) as tree:
                m = pipeline.run(definition, str(drive), str(store), quiet=True)
            walls[label] = time.perf_counter() - t
            if week == "first":
                first_peaks = (int(peak_mb() * 2**20), tree.peak)
            docs = m.get("documents") or {}
            phases = ", ".join(f"{k} {v:.1f}" for k, v in (m.get("timings") or {}).items())
            print(f"{label}: {walls[label]:.2f} s wall; {docs.get('processed', 0)} of {docs.get('distinct', 0)} "
                  f"documents processed, {docs.get('hashed', 0)} files read to hash; {m.get('pages')} pages, "
                  f"{m.get('chunks')} chunks; phases (s): {phases}", flush=True)
        # A weekly schedule starts a fresh process each week: its memory is the week's own.
        fresh = {"nothing changed": measure(drive, store, dict(os.environ))}
        label = f"{len(edit(drive, SHARE, seed=8))} files changed"
        fresh[label] = measure(drive, store, dict(os.environ))
    full = walls.pop("first run")
    print(f"\n{files} files from {DOCS}; load average at end {os.getloadavg()[0]:.1f}")
    for label, wall in walls.items():
        print(f"{label}: {wall / full:.1%} of the first run ({wall:.2f} s against {full:.2f} s)")
    mb = 2 ** 20
    print(f"\npeak memory (MB; process tree: the run's process and its workers, not the Prefect server)\n"
          f"first run, in this process: process {first_peaks[0] / mb:.0f}, tree {first_peaks[1] / mb:.0f}")
    for label, r in fresh.items():
        print(f"{label}, a fresh process ({r['processed']} documents processed, run {r['seconds']:.2f} s): "
              f"process {r['self'] / mb:.0f} ({r['self'] / first_peaks[0]:.0%} of the first run's), "
              f"tree {r['tree'] / mb:.0f} ({r['tree'] / max(first_peaks[1], 1):.0%})")


if __name__ == "__main__":
    main()
