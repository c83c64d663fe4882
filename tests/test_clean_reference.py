"""The clean step's Unicode normalisation against the Unicode Character Database.

Source: NormalizationTest.txt and DerivedAge.txt of the Unicode Character Database,
as Debian's package `unicode-data` ships them (/usr/share/unicode/; Debian 12 ships
NormalizationTest.txt bz2-compressed). The conformance rules checked are the ones
the file's own header states (Unicode Standard Annex #15, "Unicode Normalization
Forms", conformance testing).

Version gap: the file describes the Unicode version of the package (15.0.0 in Debian
12), Python's `unicodedata` another (14.0.0 in Python 3.11). Characters assigned after
Python's version are unassigned for Python, which leaves them unchanged, so a test
line that uses one cannot pass. We keep exactly the lines whose code points all have
an Age (DerivedAge.txt, same package) at or below Python's version; the
Normalization Stability Policy guarantees that the normalisation of characters
assigned by then did not change later, so every kept line must pass.
"""

from __future__ import annotations

import bz2
import unicodedata
from pathlib import Path

import pytest

from thresher.steps.clean import clean_text, normalize
from thresher.steps.units import PARAGRAPH

UCD = Path("/usr/share/unicode")
PACKAGE = "unicode-data"


def _read(name: str) -> tuple[str, Path]:
    for path in (UCD / name, UCD / f"{name}.bz2"):
        if path.is_file():
            data = path.read_bytes()
            if path.suffix == ".bz2":
                data = bz2.decompress(data)
            return data.decode("utf-8"), path
    pytest.fail(f"{UCD / name} (or .bz2) is missing: install the Debian package {PACKAGE} "
                f"(make system-deps)")


def _version(text: str) -> tuple[int, ...]:
    return tuple(int(x) for x in text.split("."))


PY_VERSION = _version(unicodedata.unidata_version)


@pytest.fixture(scope="module")
def ages() -> dict[int, tuple[int, ...]]:
    text, _ = _read("DerivedAge.txt")
    out: dict[int, tuple[int, ...]] = {}
    for line in text.splitlines():
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        cps, age = (part.strip() for part in line.split(";"))
        lo, _, hi = cps.partition("..")
        for cp in range(int(lo, 16), int(hi or lo, 16) + 1):
            out[cp] = _version(age)
    return out


@pytest.fixture(scope="module")
def suite(ages):
    """(file version, kept lines as 5-tuples of strings, part-1 code points, skipped)."""
    text, path = _read("NormalizationTest.txt")
    header = text.split("\n", 1)[0]
    assert header.startswith("# NormalizationTest-"), f"{path}: unexpected header {header!r}"
    file_version = _version(header.removeprefix("# NormalizationTest-").removesuffix(".txt"))
    lines, part1, skipped, part = [], set(), 0, None
    for raw in text.splitlines():
        if raw.startswith("@Part"):
            part = raw.split()[0]
            continue
        raw = raw.split("#", 1)[0].strip()
        if not raw:
            continue
        fields = [[int(cp, 16) for cp in f.split()] for f in raw.split(";")[:5]]
        if part == "@Part1":
            part1.add(fields[0][0])
        if all(ages.get(cp, (99,)) <= PY_VERSION for f in fields for cp in f):
            lines.append(tuple("".join(map(chr, f)) for f in fields))
        else:
            skipped += 1
    return file_version, lines, part1, skipped


def test_the_version_gap_is_what_the_restriction_assumes(suite, ages):
    file_version, lines, _, skipped = suite
    assert file_version >= PY_VERSION
    # Every code point DerivedAge says was assigned by Python's version is assigned for
    # Python too (so the restriction keeps nothing Python does not know) ...
    # (Noncharacters such as U+FFFE have an Age but stay General_Category Cn.)
    for cp, age in ages.items():
        noncharacter = (cp & 0xFFFE) == 0xFFFE or 0xFDD0 <= cp <= 0xFDEF
        if age <= PY_VERSION and not noncharacter:
            assert unicodedata.category(chr(cp)) != "Cn", f"U+{cp:04X}"
    # ... and the lines left out are only those using newer characters.
    assert len(lines) > 18_000 and (skipped > 0) == (file_version > PY_VERSION)


@pytest.mark.parametrize("form", ["NFC", "NFD", "NFKC", "NFKD"])
def test_every_form_the_step_offers_passes_the_conformance_lines(suite, form):
    # The file's header: NFC:  c2 == toNFC(c1) == toNFC(c2) == toNFC(c3); c4 == toNFC(c4) == toNFC(c5)
    #                    NFD:  c3 == toNFD(c1) == toNFD(c2) == toNFD(c3); c5 == toNFD(c4) == toNFD(c5)
    #                    NFKC: c4 == toNFKC(c1) == ... == toNFKC(c5)
    #                    NFKD: c5 == toNFKD(c1) == ... == toNFKD(c5)
    _, lines, _, _ = suite
    failures = []
    for c in lines:
        if form == "NFC":
            want = [(c[1], c[0]), (c[1], c[1]), (c[1], c[2]), (c[3], c[3]), (c[3], c[4])]
        elif form == "NFD":
            want = [(c[2], c[0]), (c[2], c[1]), (c[2], c[2]), (c[4], c[3]), (c[4], c[4])]
        elif form == "NFKC":
            want = [(c[3], x) for x in c]
        else:
            want = [(c[4], x) for x in c]
        for expected, source in want:
            if normalize(source, form) != expected:
                failures.append((source, expected))
    assert failures == []


def test_characters_not_in_part1_are_left_alone(suite, ages):
    # The file's header: "for every code point X assigned in this version of Unicode that
    # is not specifically listed in Part 1, the following invariants must be true for all
    # conformant implementations: X == toNFC(X) == toNFD(X) == toNFKC(X) == toNFKD(X)".
    _, _, part1, _ = suite
    checked = 0
    for cp, age in ages.items():
        if age > PY_VERSION or cp in part1 or 0xD800 <= cp <= 0xDFFF:
            continue
        x = chr(cp)
        for form in ("NFC", "NFD", "NFKC", "NFKD"):
            assert normalize(x, form) == x, f"U+{cp:04X} {form}"
        checked += 1
    assert checked > 250_000  # most of them private use and CJK ideographs


def _touched_by_other_rules(text: str) -> bool:
    """Characters that a clean rule other than normalisation changes (whitespace,
    controls, zero-width, soft hyphen, surrogates), or that ftfy may read as mojibake."""
    return any(ch.isspace() or unicodedata.category(ch) in ("Cc", "Cs") or ch in
               "\u200b\u200c\u200d\u2060\ufeff\u00ad" for ch in text)


def test_the_whole_clean_rule_chain_gives_the_nfkc_column(suite):
    # Through clean_text (repairs, removals, normalisation, whitespace), every source
    # column comes out as the file's NFKC column, on the lines no other rule touches.
    _, lines, _, _ = suite
    checked = 0
    failures = []
    for c in lines:
        if any(_touched_by_other_rules(x) for x in c):
            continue
        for source in c:
            got = clean_text(source, PARAGRAPH, "NFKC", {})
            if got != c[3]:
                failures.append((source, c[3], got))
        checked += 1
    assert failures == []
    assert checked > 17_000
