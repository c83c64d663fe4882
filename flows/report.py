"""`thresher report`: the review page, one static HTML file.

report_data.py reads what the page shows from the store; report_html.py draws it.
This module is what the command line calls.
"""

from __future__ import annotations

import os
import uuid
from pathlib import Path

from thresher.flows.report_data import ReportError, gather
from thresher.flows.report_html import render
from thresher.flows.store import Store

__all__ = ["ReportError", "build_report", "write_report"]


def build_report(store: Store, run_id: str | None = None) -> str:
    """The review page of `run_id` (default: the latest committed run) as HTML text."""
    return render(gather(store, run_id))


def write_report(store: Store, out_path: str | os.PathLike[str], run_id: str | None = None) -> Path:
    """Write the review page to `out_path` and return its absolute path.

    Raises ReportError (one-line message) when the store has no committed run, the
    run is unknown, or the file cannot be written. The file is written under a
    temporary name and renamed, so a reader never sees half a page.
    """
    out = Path(out_path).expanduser()
    if out.is_dir():
        raise ReportError(f"{out} is a folder; give a file name such as {out / 'report.html'}")
    page = build_report(store, run_id)
    tmp = out.with_name(f".{out.name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_bytes(page.encode("utf-8"))
        os.replace(tmp, out)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise ReportError(f"cannot write {out}: {exc.strerror or exc}") from None
    return out.resolve()
