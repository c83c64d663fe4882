"""Damaged files at volume: real files of every format on the demo drive, mutated
(truncated at a random offset, bytes flipped, blocks swapped), go through extraction
the way a run calls it (child process, time limit, rows). No call may crash or hang
past the time limit, and every file must give at least one row: text, or a failure
with a specific reason.

Seeded. THRESHER_FUZZ_CASES sets the number of cases (`make fuzz` runs thousands);
the corpus is one file per format found on the demo drive, so a format joins the
fuzz as soon as a file of it is on the drive.
"""

from __future__ import annotations

import os
import random
import time
from datetime import datetime, timezone
from collections import Counter
from pathlib import Path

import pytest

from conftest import SAMPLE
import yaml

from thresher.flows.config import build_definition, default_config_text
from thresher.flows.execute import _call_step, _rows_for
from thresher.flows.isolate import IsolatedCaller
from thresher.flows.rows import RowContext
from thresher.steps.extract.sniff import sniff
from thresher.steps.spec import StepContext
from thresher.steps.units import FAILED, OK, SKIPPED, Source

CASES = int(os.environ.get("THRESHER_FUZZ_CASES", "400"))
SEED = int(os.environ.get("THRESHER_FUZZ_SEED", "14"))
TIME_LIMIT = 10.0


def corpus() -> dict[str, Path]:
    """The smallest non-empty file of each format the demo drive holds."""
    out: dict[str, Path] = {}
    for p in sorted(SAMPLE.rglob("*"), key=lambda p: (p.stat().st_size if p.is_file() else 0, str(p))):
        if not p.is_file() or p.stat().st_size == 0:
            continue
        found = sniff(p.read_bytes(), str(p.relative_to(SAMPLE)))
        if found.format and not found.reason:
            out.setdefault(found.format, p)
    return out


def mutate(data: bytes, rng: random.Random) -> tuple[str, bytes]:
    kind = rng.choice(["truncate", "flip", "swap"])
    if kind == "truncate":
        return kind, data[: rng.randrange(1, len(data))]
    buf = bytearray(data)
    if kind == "flip":
        for _ in range(rng.randint(1, 16)):
            buf[rng.randrange(len(buf))] ^= 1 << rng.randrange(8)
        return kind, bytes(buf)
    size = rng.randint(1, max(1, len(buf) // 8))
    a, b = sorted(rng.sample(range(0, len(buf) - size + 1), 2)) if len(buf) > 2 * size else (0, 0)
    if b - a >= size:
        buf[a:a + size], buf[b:b + size] = buf[b:b + size], buf[a:a + size]
    return kind, bytes(buf)


def test_the_corpus_has_every_format_the_drive_has():
    formats = set(corpus())
    assert {"pdf", "html", "docx", "markdown", "text"} <= formats


def test_mutated_files_give_a_row_each_never_a_crash_or_a_hang():
    data = yaml.safe_load(default_config_text())
    data["steps"][0]["params"]["time_limit_seconds"] = TIME_LIMIT
    step = build_definition(data).steps[0]
    assert step.name == "extract"
    files = corpus()
    rng = random.Random(SEED)
    seen: Counter = Counter()
    with IsolatedCaller() as caller:
        for n in range(CASES):
            fmt = sorted(files)[n % len(files)]
            original = files[fmt].read_bytes()
            kind, data = mutate(original, rng)
            path = f"fuzz/{n:05d}-{kind}{files[fmt].suffix}"
            source = Source(doc_id=f"{n:064d}", source_path=path, data=data, size=len(data), mtime=0.0)
            t0 = time.monotonic()
            units = _call_step(step, source, StepContext(doc_id=source.doc_id, source_path=path), caller)
            elapsed = time.monotonic() - t0
            # The time limit holds (plus the cost of replacing a killed child).
            assert elapsed < TIME_LIMIT + 15, f"case {n} ({fmt}, {kind}, seed {SEED}) took {elapsed:.0f} s"
            ctx = RowContext("fuzz", source.doc_id, path, "extract", step.spec.version, step.digest, "pages", None,
                             datetime(2026, 1, 1, tzinfo=timezone.utc), elapsed * 1000, {})
            rows = _rows_for(step, ctx, units)
            assert rows, f"case {n} ({fmt}, {kind}, seed {SEED}) gave no row"
            for r in rows:
                if r["status"] in (FAILED, SKIPPED):  # skipped: a container's own unit, a non-document
                    assert r["reason"] and len(r["reason"]) > 12, f"case {n}: vague reason {r['reason']!r}"
                else:
                    assert r["status"] == OK, f"case {n}: status {r['status']}"
            seen[(fmt, "failed" if all(r["status"] == FAILED for r in rows) else "read")] += 1
    # Mutations must reach the parsers, not only the sniffing: some files still read.
    assert sum(v for (f, s), v in seen.items() if s == "read") > CASES // 10
    assert sum(v for (f, s), v in seen.items() if s == "failed") > 0
