"""Office formats: our readers beside LibreOffice, and the spreadsheet library choice.

1. Spreadsheet libraries: python-calamine (one reader for .xlsx/.xls/.ods) against
   openpyxl (read-only, streaming) for .xlsx and xlrd for .xls, on a generated sheet
   of 100,000 rows x 8 columns (60,000 for .xls, whose limit is 65,536 rows): seconds
   to read every cell, and the peak memory of a fresh process doing only that.
2. Peak memory of the whole extract step on that 100,000-row workbook.

Each measurement runs in its own process (peak RSS from getrusage is per process).
"""

from __future__ import annotations

import datetime as dt
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROWS = 100_000
XLS_ROWS = 60_000


def _make_xlsx(path: Path, rows: int) -> None:
    import openpyxl

    wb = openpyxl.Workbook(write_only=True)
    ws = wb.create_sheet("Loans")
    ws.append(["Date", "Branch", "Item", "Borrower", "Loans", "Returns", "Fine", "Note"])
    day = dt.date(2026, 1, 1)
    for i in range(rows):
        ws.append([day + dt.timedelta(days=i % 365), f"Branch {i % 7}", f"Item {i}",
                   f"Reader {i % 997}", i % 50, i % 43, round((i % 13) * 0.25, 2),
                   "renewed twice" if i % 5 == 0 else "on time"])
    wb.save(path)


_CHILD = r"""
import io, json, resource, sys, time
kind, path = sys.argv[1], sys.argv[2]
start = time.perf_counter()
cells = 0
if kind == "calamine":
    from python_calamine import CalamineWorkbook
    wb = CalamineWorkbook.from_path(path)
    for i in range(len(wb.sheet_names)):
        for row in wb.get_sheet_by_index(i).iter_rows():
            cells += len(row)
elif kind == "openpyxl":
    import openpyxl
    wb = openpyxl.load_workbook(path, read_only=True, data_only=True)
    for ws in wb.worksheets:
        for row in ws.iter_rows(values_only=True):
            cells += len(row)
elif kind == "xlrd":
    import xlrd
    wb = xlrd.open_workbook(path, on_demand=True)
    for i in range(wb.nsheets):
        sh = wb.sheet_by_index(i)
        for r in range(sh.nrows):
            cells += len(sh.row_values(r))
elif kind == "extract":
    from thresher.steps.extract import ExtractParams, extract
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Source
    data = open(path, "rb").read()
    pages = extract(Source("d", path, data, len(data), 0.0), ExtractParams(), StepContext())
    assert all(p.status == "ok" for p in pages), [p.reason for p in pages]
    cells = sum(len(p.text) for p in pages)
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, "cells": cells,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def measure(kind: str, path: Path) -> dict:
    out = subprocess.run([sys.executable, "-c", _CHILD, kind, str(path)], check=True,
                         capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _soffice_convert(src: Path, target: str, outdir: Path, profile: Path) -> Path:
    subprocess.run(["soffice", f"-env:UserInstallation=file://{profile}", "--headless",
                    "--norestore", "--convert-to", target, "--outdir", str(outdir), str(src)],
                   check=True, capture_output=True, timeout=900)
    return outdir / f"{src.stem}.{target.split(':')[0]}"


def spreadsheet_libraries(work: Path) -> None:
    xlsx = work / "loans.xlsx"
    _make_xlsx(xlsx, ROWS)
    print(f"generated {xlsx.name}: {ROWS:,} rows x 8 columns, {xlsx.stat().st_size / 1e6:.1f} MB")
    results = {"calamine .xlsx": measure("calamine", xlsx),
               "openpyxl .xlsx (read-only)": measure("openpyxl", xlsx)}
    if shutil.which("soffice"):
        small = work / "loans60k.xlsx"
        _make_xlsx(small, XLS_ROWS)
        xls = _soffice_convert(small, "xls:MS Excel 97", work, work / "profile")
        results["calamine .xls (60k rows)"] = measure("calamine", xls)
        results["xlrd .xls (60k rows)"] = measure("xlrd", xls)
    else:
        print("(LibreOffice not installed: no .xls comparison; `make office`)")
    print(f"{'reader':<28} {'seconds':>8} {'cells/s':>10} {'peak MB':>8}")
    for name, r in results.items():
        print(f"{name:<28} {r['seconds']:>8.2f} {r['cells'] / r['seconds']:>10,.0f} {r['peak_mb']:>8.0f}")
    a, b = results["calamine .xlsx"], results["openpyxl .xlsx (read-only)"]
    print(f"openpyxl/calamine time ratio on .xlsx: {b['seconds'] / a['seconds']:.1f}x")
    whole = measure("extract", xlsx)
    print(f"extract step on the {ROWS:,}-row .xlsx: {whole['seconds']:.2f} s, "
          f"peak {whole['peak_mb']:.0f} MB")


def main() -> None:
    with tempfile.TemporaryDirectory(prefix="thresher-bench-formats-") as tmp:
        spreadsheet_libraries(Path(tmp))


if __name__ == "__main__":
    main()
