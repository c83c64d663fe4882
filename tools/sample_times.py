#!/usr/bin/env python3
"""Give the demo drive's files their (fictional) modification times.

Git does not keep modification times, so a fresh clone's files all look modified at
checkout, in checkout order. thresher reads those times (which copy of the same bytes
the hand-off names, which revision of a near-duplicate is kept), so `make demo` and
the tests set them from here first, the same on every machine.

Usage: sample_times.py [DRIVE]     (default: the repo's sample_inputs/)
"""

from __future__ import annotations

import os
import sys
from datetime import datetime, timezone
from pathlib import Path

# Path under the drive -> when it was last modified (UTC), in the Quillfern story.
DRIVE_TIMES = {
    "README.txt": "2026-03-01T09:00",
    "archive/2024-minutes.zip": "2025-01-10T16:20",
    # The handbook was copied into the archive after its last edit: newer, yet archived.
    "archive/2025/branch-operations-handbook.pdf": "2025-12-19T11:05",
    "board/2025-11-18-board-minutes.md": "2025-11-20T10:30",
    "board/2026-01-20-board-minutes.md": "2026-01-22T14:10",
    "events/spring-reading-programme-2026.pdf": "2026-02-10T12:00",
    "finance/2026-01-14-receipt-stationery-scan.pdf": "2026-01-14T15:45",
    "finance/2026-02-expense-claim-pellifer.txt": "2026-02-27T17:02",
    "forms/meeting-room-booking-form.docx": "2025-06-03T09:40",
    "hr/salary-review-2026-protected.pdf": "2026-01-30T08:55",
    "hr/staff-contact-list.md": "2026-02-02T13:15",
    "intranet/index.html": "2025-10-01T08:00",
    "intranet/new-staff-welcome.html": "2025-10-01T08:05",
    "intranet/opening-hours.html": "2026-01-05T08:10",
    "intranet/reporting-a-fault.html": "2025-10-01T08:15",
    "it/label-printer-logo.txt": "2025-04-11T10:00",
    "it/scanner-log.txt": "2026-01-14T15:46",
    "mail/2026-03-02-lindle-cross-heating.eml": "2026-03-02T07:58",
    "notices/brackenmoor-closure.de.html": "2026-02-16T11:30",
    "notices/brackenmoor-closure.fr.txt": "2026-02-16T11:35",
    "operations/branch-opening-hours-2026.xlsx": "2026-01-05T08:20",
    "operations/branch-operations-handbook.pdf": "2025-09-01T10:00",
    "policies/lending-policy-2025.pdf": "2025-01-15T09:00",
    "policies/lending-policy-2026.pdf": "2026-01-12T09:00",
    # The rota was exported for the Windows kiosk, then edited once more at its home.
    "volunteers/volunteer-rota-spring-2026.txt": "2026-02-20T18:30",
    "volunteers/welcome-new-volunteers.pptx": "2025-09-15T10:00",
    "volunteers/windows-export/volunteer-rota-spring-2026.txt": "2026-02-18T12:00",
}


def apply(drive: Path) -> int:
    """Set each listed file's access and modification time; returns how many were set."""
    n = 0
    for rel, when in DRIVE_TIMES.items():
        path = drive / rel
        if path.is_file():
            t = datetime.fromisoformat(when).replace(tzinfo=timezone.utc).timestamp()
            os.utime(path, (t, t))
            n += 1
    return n


if __name__ == "__main__":
    root = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parents[1] / "sample_inputs"
    apply(root)
