"""Named fault points: THRESHER_FAULT=<point> makes the process die there, as a killed
writer would (exit code 75, no clean-up), so tests can prove the store survives a
death at every write boundary. Each point is named after what has been written when
it fires; FAULT_POINTS lists the store's, each tested in tests/test_faults.py; delivery to
targets has its own (deliver-*, tests/test_deliver.py).
"""

from __future__ import annotations

import os

EXIT_CODE = 75
FAULT_EXIT = EXIT_CODE

# A run (and a rerun, which shares its write path).
RUN_POINTS = (
    "part-before-ledger",      # a batch's stage part is written, its ledger not yet
    "after-first-batch",       # the first batch's parts and ledgers are written
    "after-corpus",            # a corpus step (dedup) has written its rows
    "handoff-chunks-staged",   # the staged hand-off is written, its digests not yet
    "handoff-digests-staged",  # digests staged, the change set not yet
    "handoff-staged",          # hand-off, digests and change set staged
    "catalog-staged",          # the new catalog is staged (runs only, not reruns)
    "before-commit",           # everything staged, the manifest not yet written
    "after-commit",            # the manifest is written, nothing published yet
    "mid-publish",             # the first staged file is published, the others not
    "mid-sweep",               # a run cleaning up after a killed one removed one folder
)
# Compaction (by hand or automatic after a run) and retention.
COMPACT_POINTS = (
    "compact-parts-written",   # the new large parts are written, the ledger not yet
    "compact-ledger-written",  # parts and ledger written, the record not switched
    "compact-switched",        # the record names the new parts; old files still there
    "compact-mid-remove",      # one replaced folder removed, the others not yet
)
RETAIN_POINTS = (
    "retain-stage-rewritten",  # the first stage is rewritten without the old attempts
    "retain-changes-noted",    # the change sets to remove are noted, still on disk
    "retain-changes-removed",  # old change sets removed, old runs still there
    "retain-manifest-removed", # an old run's manifest removed, its folder not yet
    "retain-run-swept",        # an old run's folders removed, its change set not yet
)
FAULT_POINTS = RUN_POINTS + COMPACT_POINTS + RETAIN_POINTS


def fault(point: str) -> None:
    """Die here if the environment asks for this point (a testing aid)."""
    if os.environ.get("THRESHER_FAULT") == point:
        os._exit(EXIT_CODE)
