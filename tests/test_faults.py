"""The fault matrix: a writer killed at every named write boundary of a run, a rerun,
compaction and retention (flows/faults.py) leaves a store that verifies clean and reads
as its last committed state, and the next run reaches a hand-off identical to that of
a run never killed. Plus kills from outside (SIGKILL at seeded random moments).

All child processes share the test harness's one Prefect server (harness_env), and
every case starts from a copy of a store prepared once per module.
"""

from __future__ import annotations

import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import SAMPLE
from thresher.flows import faults, pipeline
from thresher.flows.config import load_definition
from thresher.flows.store import Store
from thresher.flows.verify import PROBLEM, verify

THRESHER = str(Path(sys.executable).with_name("thresher"))
EDITED = "board/2026-01-20-board-minutes.md"
RERUN = "board/2025-11-18-board-minutes.md"


def _run(source: Path, store: Path, **kw) -> dict:
    return pipeline.run(load_definition(), str(source), str(store), workers=1, quiet=True, **kw)


def _content(store_dir: Path) -> list[dict]:
    h = Store(store_dir).handoff()
    return [] if h is None else [{k: v for k, v in r.items() if k != "run_id"} for r in h.to_pylist()]


def _edit(drive: Path, n: int) -> None:
    f = drive / EDITED
    f.write_text(f.read_text() + f"\n\n## Item {n}\n\nThe Quillfern board noted change number {n}.\n")


def _drive(root: Path, edits: int) -> Path:
    d = root / f"drive{edits}"
    if not d.exists():
        shutil.copytree(SAMPLE, d)
        for n in range(1, edits + 1):
            _edit(d, n)
    return d


class World:
    """Stores prepared once: `base` (one run), `aged` (three runs, one document edited
    in each later one), and the hand-offs a never-killed next run reaches from them."""

    def __init__(self, root: Path):
        self.root = root
        self.base = root / "base"
        _run(_drive(root, 0), self.base)
        ref = root / "ref1"
        shutil.copytree(self.base, ref)
        _run(_drive(root, 1), ref)
        self.ref1 = _content(ref)
        self.aged = root / "aged"
        shutil.copytree(ref, self.aged)
        _run(_drive(root, 2), self.aged)
        ref3 = root / "ref3"
        shutil.copytree(self.aged, ref3)
        _run(_drive(root, 3), ref3)
        self.ref3 = _content(ref3)
        doc = {r["source_path"]: r["doc_id"] for r in Store(self.base).catalog().to_pylist()}
        self.rerun_doc = doc[RERUN]

    def copy(self, which: Path, dst: Path) -> Path:
        shutil.copytree(which, dst)
        return dst


@pytest.fixture(scope="module")
def world(prefect_harness, tmp_path_factory) -> World:
    return World(tmp_path_factory.mktemp("faults"))


def _killed(cmd: list[str], env: dict, point: str) -> None:
    r = subprocess.run([THRESHER, *cmd], env={**env, "THRESHER_FAULT": point}, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == faults.EXIT_CODE, f"{point} never fired (exit {r.returncode}): {r.stderr[-2000:]}"


def _assert_clean(store_dir: Path) -> None:
    problems = [f.line() for f in verify(Store(store_dir)) if f.severity == PROBLEM]
    assert problems == []


def _status_reads(store_dir: Path, env: dict) -> None:
    r = subprocess.run([THRESHER, "status", "--store", str(store_dir), "--json"], env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr


# Points a run passes; the ones after the commit leave the new state visible.
COMMITTED_AT = {"after-commit", "mid-publish"}


@pytest.mark.parametrize("point", faults.RUN_POINTS)
def test_a_run_killed_at_a_write_boundary(world, harness_env, tmp_path, point):
    store_dir = world.copy(world.base, tmp_path / "store")
    before = _content(store_dir)
    drive = _drive(world.root, 1)
    if point == "mid-sweep":  # needs leftovers of an earlier killed run to sweep
        _killed(["run", "--source", str(drive), "--store", str(store_dir), "--quiet"], harness_env, "handoff-staged")
    _killed(["run", "--source", str(drive), "--store", str(store_dir), "--quiet"], harness_env, point)
    _assert_clean(store_dir)
    assert _content(store_dir) == (world.ref1 if point in COMMITTED_AT else before)
    _run(drive, store_dir)
    assert _content(store_dir) == world.ref1
    _assert_clean(store_dir)
    assert not Store(store_dir).uncommitted_run_dirs()


RERUN_POINTS = [p for p in faults.RUN_POINTS if p not in ("catalog-staged", "mid-sweep", "after-corpus")]


@pytest.mark.parametrize("point", RERUN_POINTS)
def test_a_rerun_killed_at_a_write_boundary(world, harness_env, tmp_path, point):
    store_dir = world.copy(world.base, tmp_path / "store")
    before = _content(store_dir)
    _killed(["rerun", "--store", str(store_dir), "--path", RERUN, "--step", "clean",
             "--source", str(SAMPLE), "--quiet"], harness_env, point)
    _assert_clean(store_dir)
    assert _content(store_dir) == before  # a rerun of unchanged input changes no chunk
    _run(SAMPLE, store_dir, rerun={"doc_id": world.rerun_doc, "page": None, "step": "clean"})
    assert _content(store_dir) == before
    _assert_clean(store_dir)


@pytest.mark.parametrize("point", faults.COMPACT_POINTS + faults.RETAIN_POINTS)
def test_housekeeping_killed_at_a_write_boundary(world, harness_env, tmp_path, point):
    store_dir = world.copy(world.aged, tmp_path / "store")
    before = _content(store_dir)
    verb = ["compact"] if point.startswith("compact") else ["retain", "--keep-runs", "1"]
    _killed([*verb, "--store", str(store_dir)], harness_env, point)
    _assert_clean(store_dir)
    assert _content(store_dir) == before
    _status_reads(store_dir, harness_env)
    _run(_drive(world.root, 3), store_dir)
    assert _content(store_dir) == world.ref3
    _assert_clean(store_dir)


SMALL = ["policies/lending-policy-2025.pdf", "policies/lending-policy-2026.pdf", "intranet/opening-hours.html",
         "intranet/index.html", "board/2026-01-20-board-minutes.md", "forms/meeting-room-booking-form.docx",
         "volunteers/volunteer-rota-spring-2026.txt", "notices/brackenmoor-closure.fr.txt"]


def test_runs_killed_from_outside_at_random_moments(prefect_harness, harness_env, tmp_path):
    """SIGKILL at 20 seeded random moments of forced runs (every document through
    extract, the corpus steps, the hand-off and the commit) on a small drive of every
    format; after each kill the store verifies clean and its hand-off is the committed
    one; the run after the last kill matches a clean run."""
    rng = random.Random(14)
    drive = tmp_path / "drive"
    for rel in SMALL:
        (drive / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(SAMPLE / rel, drive / rel)
    store_dir = tmp_path / "store"
    cmd = [THRESHER, "run", "--source", str(drive), "--store", str(store_dir), "--quiet", "--force"]
    t0 = time.monotonic()
    subprocess.run(cmd, env=harness_env, capture_output=True, timeout=300, check=True)
    span = time.monotonic() - t0  # how long a forced run takes here: the moments spread over it
    reference = _content(store_dir)
    assert reference
    kills = 0
    for _ in range(20):
        started = time.monotonic()
        p = subprocess.Popen(cmd, env=harness_env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            p.wait(timeout=rng.uniform(0.3 * span, span))
            # It finished before its moment: runs here are quicker than the first one was
            # (a shared machine's load changes), so later moments fall within this length.
            span = min(span, time.monotonic() - started)
        except subprocess.TimeoutExpired:
            p.send_signal(signal.SIGKILL)
            p.wait()
            kills += 1
        _assert_clean(store_dir)
        assert _content(store_dir) == reference
    assert kills >= 15  # most moments fell inside a run
    _run(drive, store_dir)
    assert _content(store_dir) == reference
    _assert_clean(store_dir)
    assert not Store(store_dir).uncommitted_run_dirs()


@pytest.fixture()
def small_fs(tmp_path):
    """A 24 MB tmpfs of the test's own (mounting needs root and a kernel that allows it)."""
    mnt = tmp_path / "fs"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=24m", "tmpfs", str(mnt)], capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a small file system here (needs root): {r.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


def test_a_full_disk_fails_the_run_and_loses_nothing(world, harness_env, small_fs):
    store_dir = world.copy(world.base, small_fs / "store")
    before = _content(store_dir)
    filler = small_fs / "filler"
    free = shutil.disk_usage(small_fs).free
    with open(filler, "wb") as f:  # leave about 64 KB: a run fails part-way through its writes
        f.write(b"\0" * max(0, free - (64 << 10)))
    r = subprocess.run([THRESHER, "run", "--source", str(_drive(world.root, 1)), "--store", str(store_dir),
                        "--quiet"], env=harness_env, capture_output=True, text=True, timeout=300)
    assert r.returncode != 0
    assert "No space left on device" in r.stderr
    filler.unlink()
    _assert_clean(store_dir)
    assert _content(store_dir) == before
    _run(_drive(world.root, 1), store_dir)
    assert _content(store_dir) == world.ref1
    _assert_clean(store_dir)


def test_a_read_only_store_is_read_but_not_written(world, harness_env, small_fs):
    store_dir = world.copy(world.base, small_fs / "store")
    before = _content(store_dir)
    subprocess.run(["mount", "-o", "remount,ro", str(small_fs)], check=True)
    r = subprocess.run([THRESHER, "run", "--source", str(_drive(world.root, 1)), "--store", str(store_dir),
                        "--quiet"], env=harness_env, capture_output=True, text=True, timeout=300)
    assert r.returncode == 2 and r.stderr.count("\n") == 1, r.stderr
    assert "cannot write to store" in r.stderr and "Read-only file system" in r.stderr
    for verb in (["status"], ["verify"], ["compact"], ["retain", "--keep-runs", "1"]):
        out = subprocess.run([THRESHER, *verb, "--store", str(store_dir)], env=harness_env,
                             capture_output=True, text=True, timeout=120)
        if verb[0] in ("status", "verify"):
            assert out.returncode == 0, out.stderr  # readers work on a read-only store
        else:
            assert out.returncode == 2 and "Read-only file system" in out.stderr
    assert _content(store_dir) == before


def test_source_files_that_vanish_or_change_after_the_scan(world, tmp_path, monkeypatch):
    from thresher.flows import discover, plan

    store_dir = world.copy(world.base, tmp_path / "store")
    drive = tmp_path / "drive"
    shutil.copytree(_drive(world.root, 1), drive)
    (drive / "notices" / "late-notice.md").write_text("# Late notice\n\nThe Quillfern fair moves indoors.\n")
    real_scan = discover.scan

    def scan_then_change(*args, **kw):
        # No bytes kept from the scan: extraction reads the drive again, as it does for a
        # file too large to keep (discover.KEEP_FILE_BYTES); that read is under test.
        found = real_scan(*args, **dict(kw, keep_bytes=0))
        (drive / "notices" / "late-notice.md").unlink()  # gone before extraction reads it
        f = drive / EDITED
        f.write_text(f.read_text() + "\nA sentence added after the scan.\n")  # changed after the scan
        return found

    monkeypatch.setattr(plan, "scan", scan_then_change)  # where a run's scan is called
    _run(drive, store_dir)

    def extract_rows() -> dict:
        store = Store(store_dir)
        ids = {r["source_path"]: r["doc_id"] for r in store.catalog().to_pylist()}
        return {r["source_path"]: r for r in store.current("extract", "pages").to_pylist()
                if ids.get(r["source_path"]) == r["doc_id"]}

    rows = extract_rows()
    assert rows["notices/late-notice.md"]["status"] == "failed"
    assert rows["notices/late-notice.md"]["reason"].startswith("cannot read file: No such file")
    assert rows[EDITED]["status"] == "failed" and "changed while the run read it" in rows[EDITED]["reason"]
    _assert_clean(store_dir)
    monkeypatch.setattr(plan, "scan", real_scan)
    _run(drive, store_dir)  # the next run reads the new version
    rows = extract_rows()
    assert rows[EDITED]["status"] == "ok" and "added after the scan" in rows[EDITED]["text"]
    gone = [r for r in Store(store_dir).catalog().to_pylist() if r["source_path"] == "notices/late-notice.md"]
    assert [r["present"] for r in gone] == [False]
    _assert_clean(store_dir)
