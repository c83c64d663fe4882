"""Navigation pages: contents, index, lists of figures or tables.

Such a page holds the titles of the whole document with page numbers, so a keyword
ranking puts it first for nearly every question; its chunks help nobody. A page is
judged from its lines (in reading order, running headers and footers already gone,
ruled tables already taken out):

* an entry line ends in a page reference: dot leaders and a number ("Basics . . . 12"),
  or a word, a space and a whole number of at most four digits ("1.2 Basics 12"); an
  index entry is a term, a comma and a list of page numbers ("apt-get, 12, 45-47");
  roman page numbers count in front matter ("Preface . . . iii");
* a page is navigation when at least MIN_ENTRIES of its lines are entries and they are
  at least ENTRY_SHARE of its lines (headings aside), and the page numbers they
  reference are no larger than the document's page count plus PAGE_SLACK (printed
  numbers may start after the front matter) and go up from entry to entry in at least
  ASCENDING_SHARE of the steps (a contents page, a list of figures), or the entries
  are index entries (or dot-leader entries) in alphabetical order in at least
  INDEX_ASCENDING_SHARE of the steps; several dot-leader entries on one line (an index
  in two columns) count as one entry line;
* a page in a section the PDF's outline titles "Index", "Contents", "List of figures"
  (OUTLINE_TITLE) needs only NEXT_MIN_ENTRIES entries making NEXT_ENTRY_SHARE of its
  lines, in any order (an index with sub-entries is not alphabetical line by line).

What this does not hit: a numbered list (numbers start its lines, not end them), a
price list (prices have decimals or currency signs, and are not in page order), a
table (ruled tables are read apart; an unruled table of figures is rarely ascending
and within the page count over most of a page). Thresholds are ours (common
practice), checked on the Debian PDFs in tests/test_extract_navigation.py against
where their outlines say the body starts.

A page right after a navigation page needs only NEXT_MIN_ENTRIES entries making
NEXT_ENTRY_SHARE of its lines (the short last page of a list). A page whose entries
are followed by BODY_WORDS words of other lines is a chapter opening with its own
contents list: the entry lines are removed (and recorded) and the page stays.

The kind is "index" for index entries, "figures"/"tables" when a heading line on the
page says "List of figures"/"List of tables", else "contents".
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass, field

MIN_ENTRIES = 5
ENTRY_SHARE = 0.6
# The last page of a contents list or an index may hold only a few entries: right after
# a navigation page, a page needs only this many entries and this share of its lines.
NEXT_MIN_ENTRIES = 2
NEXT_ENTRY_SHARE = 0.4
# A chapter's first page may carry the chapter's own contents list above its text: when
# the lines after the last entry hold this many words, only the entry lines go.
BODY_WORDS = 60
ASCENDING_SHARE = 0.8
# An index set in two columns may be read across the columns, which breaks the order
# of its terms more often than a contents list's page numbers.
INDEX_ASCENDING_SHARE = 0.65
# A section the outline names like this is navigation on fewer entries and in any order.
OUTLINE_TITLE = re.compile(
    r"^\W*(?:(?:general|concept|subject|function|keyword)?\s*(?:and\s+\w+\s+)?index|"
    r"(?:table\s+of\s+)?contents|list\s+of\s+(?:figures|tables|illustrations|examples))\W*$",
    re.IGNORECASE)
PAGE_SLACK = 50

_ROMAN = r"[ivxlcdm]{1,7}"
_LEADER_ENTRY = re.compile(rf"(?:\.\s?){{2,}}\s*(\d{{1,4}}|{_ROMAN})$", re.IGNORECASE)
# Several entries on one line (an index in two columns read as one line).
_LEADER_ANY = re.compile(rf"(?:\.\s?){{3,}}\s*(\d{{1,4}}|{_ROMAN})(?=\s|$)", re.IGNORECASE)
_SPACED_ENTRY = re.compile(r"[^\W\d]\S*\s+(\d{1,4})$")
_INDEX_ENTRY = re.compile(r"^([^\W\d].*?),\s*(\d{1,4}(?:\s*[-\u2013,]\s*\d{1,4})*)$")
_NOT_PAGE = re.compile(r"[$\u20ac\u00a3\u00a5%]|\d[.,]\d+$")
# Every entry form ends in its page reference, a digit or a roman numeral, within the
# line's last three characters (two-column leaders may leave two after it): a line
# without one is no entry, decided without the patterns above (most lines of a page).
_TAIL = re.compile(r"[\divxlcdm]", re.IGNORECASE)
_LIST_OF = re.compile(r"^\s*list\s+of\s+(figures|tables|illustrations|examples)\b", re.IGNORECASE)

_ROMAN_VALUES = {"i": 1, "v": 5, "x": 10, "l": 50, "c": 100, "d": 500, "m": 1000}


def _roman(text: str) -> int:
    total = 0
    values = [_ROMAN_VALUES[c] for c in text.lower()]
    for a, b in zip(values, values[1:] + [0]):
        total += -a if a < b else a
    return total


def _entry(line: str) -> tuple[str, int | None] | None:
    """(term, page) for an entry line: page is None for an index entry's page list and
    negative for a roman page number; None for a line that is not an entry."""
    line = line.strip()
    if not _TAIL.search(line, max(0, len(line) - 3)) or _NOT_PAGE.search(line):
        return None
    many = list(_LEADER_ANY.finditer(line))
    if len(many) > 1 and len(line) - many[-1].end() <= 2:
        # Entries side by side: the first one stands for the line.
        ref = many[0].group(1)
        return (line[:many[0].start()].strip(), int(ref) if ref.isdigit() else -_roman(ref))
    m = _LEADER_ENTRY.search(line) or (many and len(line) - many[-1].end() <= 2 and many[-1])
    if m:
        ref = m.group(1)
        return (line[:m.start()].strip(), int(ref) if ref.isdigit() else -_roman(ref))
    m = _INDEX_ENTRY.match(line)
    if m:
        return (m.group(1), None)
    m = _SPACED_ENTRY.search(line)
    if m and len(line.split()) >= 2:
        return (line[:m.start(1)].strip(), int(m.group(1)))
    return None


def _sort_key(term: str) -> str:
    text = unicodedata.normalize("NFKD", term).casefold()
    return "".join(ch for ch in text if ch.isalnum())


def _rising(values: list) -> float:
    if len(values) < 2:
        return 0.0
    return sum(1 for a, b in zip(values, values[1:]) if b >= a) / (len(values) - 1)


@dataclass
class Judgement:
    kind: str = ""  # "contents", "index", "figures", "tables" or "" (not navigation)
    entries: list[int] = field(default_factory=list)  # indexes of the entry lines


def judge_page(lines: list[str], headings: list[str], page_count: int,
               min_entries: int = MIN_ENTRIES, share: float = ENTRY_SHARE,
               ordered: bool = True) -> Judgement:
    """Whether a page's lines are navigation, and which lines are its entries.

    Heading lines, lines of one or two characters (an index's letter groups) and lines
    of digits only (a page number) are not counted either way. `ordered` False skips
    the order checks (the outline itself names the page's section an index)."""
    heads = set(headings)
    body = [i for i, ln in enumerate(lines)
            if len(ln.strip()) > 2 and not ln.strip().isdigit() and ln not in heads]
    needed = max(min_entries, share * len(body))
    found = []
    for k, i in enumerate(body):
        if len(found) + len(body) - k < needed:  # too few lines left to reach it
            return Judgement()
        e = _entry(lines[i])
        if e is not None:
            found.append((i, e))
    if len(found) < needed:
        return Judgement()
    entries = [i for i, _ in found]
    pages = [p for _, (_, p) in found if p is not None]
    terms = [_sort_key(term) for _, (term, _) in found]
    index_like = not ordered or _rising(terms) >= INDEX_ASCENDING_SHARE
    if len(pages) <= len(found) / 2:
        return Judgement("index", entries) if index_like else Judgement()
    # Roman numbers (front matter) come before arabic ones in a contents list.
    order = [(0, -p) if p < 0 else (1, p) for p in pages]
    in_range = all(p <= page_count + PAGE_SLACK for p in pages)
    if not (in_range and (not ordered or _rising(order) >= ASCENDING_SHARE)):
        # Alphabetical entries with page numbers after dot leaders: an index.
        return Judgement("index", entries) if index_like else Judgement()
    for heading in headings:
        m = _LIST_OF.match(heading)
        if m:
            kind = "tables" if m.group(1).lower() == "tables" else "figures"
            return Judgement(kind, entries)
    return Judgement("contents", entries)


def body_after_entries(lines: list[str], entries: list[int], headings: set[int]) -> int:
    """Words in the lines after the last entry line, headings aside."""
    last = max(entries) if entries else -1
    return sum(len(lines[i].split()) for i in range(last + 1, len(lines)) if i not in headings)
