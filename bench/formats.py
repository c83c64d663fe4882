"""Office formats: our readers beside LibreOffice, and the spreadsheet library choice.

0. Per format, documents/s and MB/s of the extract step on real files (the test
   suite's: Debian's ODF and EPUB files, python-pptx's decks, and LibreOffice's .xlsx,
   .xls, .doc, .ppt and .rtf saves of them), beside LibreOffice's own conversion of
   the same files to text (CSV for sheets, PDF for decks) in the same run, one
   soffice process per format; and one soffice process per .doc file against one for
   the whole batch.
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

from bench import REPO

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
import io, json, sys, time
from bench import peak_mb  # run from the repository (cwd)
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
print(json.dumps({"seconds": seconds, "cells": cells, "peak_mb": peak_mb()}))
"""


def measure(kind: str, path: Path) -> dict:
    out = subprocess.run([sys.executable, "-c", _CHILD, kind, str(path)], check=True,
                         capture_output=True, text=True, cwd=REPO)
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


ODT = Path("/usr/share/python-odf/api-for-odfpy.odt")
IDX = Path("/usr/lib/libreoffice/share/template/common/internal/idxexample.odt")
ODS = [Path("/usr/share/python-odf/examples/countrystatistics.ods"),
       Path("/usr/lib/libreoffice/program/opencl/cl-test.ods")]
OTP = Path("/usr/lib/libreoffice/share/template/en-US/presnt/debian-presentation.otp")
EPUBS = [Path("/usr/share/doc/debian-policy/policy.epub"),
         Path("/usr/share/developers-reference/developers-reference.epub")]
DECKS = sorted((Path(__file__).resolve().parent.parent / "tests" / "data" / "office").glob("*.pptx"))
# What LibreOffice converts each kind to, as the "same work" we compare with.
LO_TARGET = {"writer": "txt:Text (encoded):UTF8", "calc": "csv", "impress": "pdf"}


def _soffice(files: list[Path], target: str, outdir: Path, profile: Path) -> float:
    start = time.perf_counter()
    subprocess.run(["soffice", f"-env:UserInstallation=file://{profile}", "--headless",
                    "--norestore", "--convert-to", target, "--outdir", str(outdir),
                    *map(str, files)], check=True, capture_output=True, timeout=1800)
    return time.perf_counter() - start


def _ours(files: list[Path], rounds: int = 3) -> float:
    from thresher.steps.extract import ExtractParams, extract
    from thresher.steps.spec import StepContext
    from thresher.steps.units import Source

    datas = [(str(f), f.read_bytes()) for f in files]
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        for name, data in datas:
            pages = extract(Source("d", name, data, len(data), 0.0), ExtractParams(), StepContext())
            assert all(p.status == "ok" for p in pages), (name, [p.reason for p in pages])
        best = min(best, time.perf_counter() - start)
    return best


def formats_table(work: Path) -> None:
    if not shutil.which("soffice"):
        print("(LibreOffice not installed: no formats table; `make office` and `make system-deps`)")
        return
    profile = work / "profile"
    made = work / "made"
    made.mkdir()
    _soffice([DECKS[0]], "pdf", work / "warm", profile)  # first start creates the profile
    for target in ("xlsx:Calc MS Excel 2007 XML", "xls:MS Excel 97"):
        _soffice(ODS, target, made, profile)
    for target in ("doc:MS Word 97", "rtf"):
        _soffice([ODT, IDX], target, made, profile)
    _soffice(DECKS, "ppt:MS PowerPoint 97", made, profile)
    sets = {
        "odt": ("writer", [ODT, IDX]), "doc": ("writer", sorted(made.glob("*.doc"))),
        "rtf": ("writer", sorted(made.glob("*.rtf"))),
        "ods": ("calc", ODS), "xlsx": ("calc", sorted(made.glob("*.xlsx"))),
        "xls": ("calc", sorted(made.glob("*.xls"))),
        "pptx": ("impress", DECKS), "ppt": ("impress", sorted(made.glob("*.ppt"))),
        "odp": ("impress", [OTP]), "epub": ("", EPUBS),
    }
    print(f"{'format':<6} {'files':>5} {'MB':>6} {'docs/s':>8} {'MB/s':>7} "
          f"{'LibreOffice s':>13} {'ours s':>7} {'LO/ours':>8}")
    for fmt, (app, files) in sets.items():
        files = [f for f in files if f.exists()]
        if not files:
            continue
        mb = sum(f.stat().st_size for f in files) / 1e6
        ours = _ours(files)
        lo = (_soffice(files, LO_TARGET[app], work / "out" / fmt, profile) if app else None)
        lo_text = f"{lo:>13.2f}" if lo is not None else f"{'(no reader)':>13}"
        ratio = f"{lo / ours:>7.1f}x" if lo is not None else f"{'':>8}"
        print(f"{fmt:<6} {len(files):>5} {mb:>6.2f} {len(files) / ours:>8.1f} {mb / ours:>7.2f} "
              f"{lo_text} {ours:>7.2f} {ratio}")
    docs = sorted(made.glob("*.doc")) * 3
    batch_dir = work / "batch"
    batch_dir.mkdir()
    copies = []
    for i, doc in enumerate(docs):
        copy = batch_dir / f"{i}-{doc.name}"
        copy.write_bytes(doc.read_bytes())
        copies.append(copy)
    one_each = sum(_soffice([c], "docx:MS Word 2007 XML", work / "one", profile) for c in copies)
    together = _soffice(copies, "docx:MS Word 2007 XML", work / "together", profile)
    print(f"LibreOffice .doc -> .docx, {len(copies)} files: one process per file {one_each:.1f} s, "
          f"one process for the batch {together:.1f} s ({one_each / together:.1f}x)")


def _make_deck(path: Path, slides: int) -> None:
    import pptx
    from pptx.util import Inches

    deck = pptx.Presentation()
    layout = deck.slide_layouts[1]
    for i in range(slides):
        slide = deck.slides.add_slide(layout)
        slide.shapes.title.text = f"Branch briefing {i + 1}"
        body = slide.placeholders[1].text_frame
        body.text = f"Opening checks for week {i % 52 + 1}"
        for line in ("Returns trolley", "Holds shelf", "Public computers"):
            body.add_paragraph().text = line
        if i % 10 == 0:
            table = slide.shapes.add_table(4, 3, Inches(1), Inches(5), Inches(6), Inches(1.5)).table
            for r in range(4):
                for c in range(3):
                    table.cell(r, c).text = f"r{r}c{c}"
        slide.notes_slide.notes_text_frame.text = "Remind the team about the fire drill."
    deck.save(path)


def big_deck(work: Path) -> None:
    deck = work / "briefings.pptx"
    _make_deck(deck, 300)
    r = measure("extract", deck)
    print(f"extract step on a 300-slide .pptx ({deck.stat().st_size / 1e6:.1f} MB): "
          f"{r['seconds']:.2f} s, peak {r['peak_mb']:.0f} MB")


def main() -> None:
    with tempfile.TemporaryDirectory(prefix="thresher-bench-formats-") as tmp:
        work = Path(tmp)
        (work / "sheets").mkdir()
        (work / "table").mkdir()
        formats_table(work / "table")
        spreadsheet_libraries(work / "sheets")
        big_deck(work)


if __name__ == "__main__":
    main()
