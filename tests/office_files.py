"""Real office files for the reader tests, and LibreOffice to convert and export them.

Where the files come from (each installed by `make system-deps`, DEBIAN_TEST_PACKAGES):
- python-odf-doc: countrystatistics.ods (a spreadsheet of country figures) and
  api-for-odfpy.odt (the odfpy API manual, written in OpenOffice.org).
- libreoffice-common: opencl/cl-test.ods (LibreOffice's OpenCL self-test sheet,
  formulas with cached results), share/template/common/internal/idxexample.odt.
- debian-policy, developers-reference: the manuals as EPUB books.
Formats no Debian package ships (.xlsx, .xls, .pptx, .ppt, .doc, .rtf) are written
from these by LibreOffice itself, a real writer of those formats, at test set-up.

Outside reference: LibreOffice's own text and CSV export of the same file.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from collections import Counter
from pathlib import Path

import pytest

COUNTRY_ODS = Path("/usr/share/python-odf/examples/countrystatistics.ods")
ODFPY_ODT = Path("/usr/share/python-odf/api-for-odfpy.odt")
CL_TEST_ODS = Path("/usr/lib/libreoffice/program/opencl/cl-test.ods")
IDX_ODT = Path("/usr/lib/libreoffice/share/template/common/internal/idxexample.odt")
POLICY_EPUB = Path("/usr/share/doc/debian-policy/policy.epub")
DEVREF_EPUB = Path("/usr/share/developers-reference/developers-reference.epub")

# LibreOffice's CSV filter: comma, double quote, UTF-8 (76), from line 1, default
# column formats, language, quoted text off, detect numbers, "save cell contents as
# shown" on, export formulas off, remove spaces off, and -1 = every sheet into its own
# file "<name>-<sheet>.csv" (LibreOffice 7.2 and later).
CSV_ALL_SHEETS = "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,true,false,false,-1"


def need(path: Path, package: str) -> Path:
    if not path.exists():
        pytest.fail(f"needs {path} (Debian package {package}): run `make system-deps`")
    return path


def soffice(args: list[str], profile: Path, timeout: float = 240) -> None:
    if shutil.which("soffice") is None:
        pytest.fail("needs LibreOffice (Debian packages libreoffice-writer-nogui, "
                    "libreoffice-calc-nogui, libreoffice-impress-nogui): run `make system-deps`")
    subprocess.run(["soffice", f"-env:UserInstallation=file://{profile}", "--headless",
                    "--norestore", *args], check=True, capture_output=True, timeout=timeout)


def convert(src: Path, target: str, outdir: Path, profile: Path) -> Path:
    """`src` converted by LibreOffice to `target` ("xlsx", "txt:Text (encoded):UTF8"...)."""
    outdir.mkdir(parents=True, exist_ok=True)
    soffice(["--convert-to", target, "--outdir", str(outdir), str(src)], profile)
    ext = target.split(":")[0]
    out = outdir / f"{src.stem}.{ext}"
    assert out.exists(), f"LibreOffice wrote no {out.name}"
    return out


_WORD = re.compile(r"\w+", re.UNICODE)
# A number as a program may show it: digit groups ("83,858"), decimals ("2.0"),
# exponents ("1.00E-12").
_NUMBER = re.compile(r"(?<![\w.,])-?(?:\d{1,3}(?:,\d{3})+|\d+)(?:\.\d+)?(?:[eE][-+]?\d+)?(?![\w,])")


def _as_value(found: re.Match) -> str:
    """The number to 12 significant digits (a program may show fewer than it stores)."""
    value = float(found.group().replace(",", ""))
    return str(int(value)) if value.is_integer() and abs(value) < 1e15 else f"{value:.12g}"


def words(text: str, numbers_by_value: bool = False) -> Counter:
    if numbers_by_value:
        text = _NUMBER.sub(_as_value, text)
    return Counter(w.casefold() for w in _WORD.findall(text))


def bag_f1(ours: str, theirs: str, numbers_by_value: bool = False) -> float:
    """Bag-of-words F1: word multiset overlap (casefolded \\w+ runs). With
    `numbers_by_value`, "83,858" and "83858", "2.0" and "2" are the same word (for
    spreadsheets, whose number formats we do not apply)."""
    a, b = words(ours, numbers_by_value), words(theirs, numbers_by_value)
    common = sum((a & b).values())
    if not common:
        return 0.0
    precision = common / sum(a.values())
    recall = common / sum(b.values())
    return 2 * precision * recall / (precision + recall)
