"""Page geometry into reading order: lines, columns, running headers, hyphenated words.

Coordinates are points from the top-left corner of the page (y grows downwards).

Lines. Words whose vertical centres lie within 0.35 of a line height of each other
are one line (so a superscript stays with its line); words of a line are read left
to right. Two columns whose baselines happen to align become one geometric line here
and are split again at the gutter below.

Columns (per page). A gutter is a vertical strip at least GUTTER_EM wide, with at
least COLUMN_EM of text on either side, that at most SPANNING_SHARE of the page's
lines cross (a title, an abstract or a caption may span the columns), and that has
text on both sides in at least a fifth of the lines (3 or more). So that a two-column
list (terms on the left, their descriptions on the right) or a code listing with
aligned values is not taken for columns, the lines on each side must fill their
column: half of them reach at least FILL_SHARE of the column's width. (Common
practice for whitespace-gutter detection; thresholds ours, checked on every page of
the single-column PDFs Debian ships — none finds a gutter there — and on two-column
pages built in tests/test_extract_pdf_layout.py.) The page is then read band by
band: lines that cross no gutter are read column after column, top to bottom within
each column; a line that crosses a gutter is read where it stands and closes the
band above it.

Running headers and footers (per document). A line among the first two or last two of
a page, in the top or bottom 8 % of it, whose text (digits ignored, so page numbers
match) recurs within 3 pt of the same height on at least half of the text pages (and
on 2 or more) is removed; each removal is recorded with what it was (page number,
running header, running footer) and why. (Common practice; thresholds ours. On the
two PDFs Debian ships in /usr/share/doc from shared-mime-info and libtasn1-doc,
headers sit at 6 % of the page height and the first body line at 9 %.) A header that
varies with the chapter ("CHAPTER 7. BASICS OF ... 7.7. WHAT IS ...", "12 Chapter 2.
The Debian Archive") is removed too when header or footer lines stand at its height
(within 3 pt) on at least half of the text pages and its text is a chapter or section
label with a number, or starts or ends with a title from the outline or the metadata
(`follows_document`); such removals are recorded the same way.

Hyphenated line ends (per document; common practice, the rule is ours). When a line
ends in a hyphen right after a letter and the next line starts with a letter, the
document's own vocabulary decides: the hyphenated form ("built-in") is kept when it
occurs elsewhere in the document more often than the joined form ("builtin"), and the
word is joined when the joined form occurs more often. When neither occurs, the word
is joined if the continuation starts lower case (a typesetter's break: "re-" +
"newed"), or both parts are upper case ("ELE-" + "MENT"); otherwise the hyphen is
kept without a space ("Quillfern-" + "Central", "ISO-" + "8859"). A soft hyphen
(U+00AD) at a line end always joins.
"""

from __future__ import annotations

import re
from bisect import bisect_right
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from operator import attrgetter

import numpy as np

from .pdf_text import WORD_GAP, Word, WordColumns

GUTTER_EM = 0.6
COLUMN_EM = 12.0
SPANNING_SHARE = 0.15
FILL_SHARE = 0.6
MARGIN_SHARE = 0.08
REPEAT_Y_TOLERANCE = 3.0

_DIGITS = re.compile(r"\d+")
_PAGE_NUMBER = re.compile(
    r"^\W*(?:(?:page|p\.|seite|pagina|página)\s*)?(?:\d+|[ivxlcdm]+)(?:\s*(?:of|/|von|de|sur)\s*\d+)?\W*$",
    re.IGNORECASE,
)
# TeX's left quote glyph in some fonts maps to U+0300 (a combining grave accent) in the
# text layer, so "`stable'" reads as U+0300 + "stable’". At a word's start, where no
# letter can carry the accent, it is the quote (seen in debian-faq's PDF).
_TEX_GRAVE = re.compile(r"(?:^|(?<=[\s(\[\u201c\u2018\"]))\u0300")
_WORDS = re.compile(r"[^\W\d_]+(?:-[^\W\d_]+)*")


@dataclass
class Line:
    text: str
    top: float
    bottom: float
    x0: float
    x1: float
    size: float
    bold: bool
    chars: int
    words: list[Word] = field(default_factory=list, repr=False)
    heading: bool = False
    level: int = 0
    column: int = 0  # -1: crosses a gutter
    indent: float = 0.0  # x0 minus the usual left edge of the line's column

    @property
    def style(self) -> tuple[float, bool]:
        return (round(self.size * 2) / 2, self.bold)

    @property
    def hyphen(self) -> bool:
        return bool(self.words) and self.words[-1].hyphen


_X0 = attrgetter("x0")
# Pieces closer than this share of the larger font size join without a space.
_TOUCH = 0.25 * WORD_GAP


def line_from(words: list[Word]) -> Line:
    if len(words) > 1:
        words = sorted(words, key=_X0)
    first = words[0]
    if len(words) == 1:
        text, size, bold_chars, chars = first.text, first.size, first.chars if first.bold else 0, first.chars
        top, bottom, x1 = first.top, first.bottom, first.x1
    else:
        # Pieces that touch (a superscript, a change of font inside a word) join.
        parts = [first.text]
        for prev, w in zip(words, words[1:]):
            limit = _TOUCH * (w.size if w.size > prev.size else prev.size or 1.0)
            parts.append(w.text if w.x0 - prev.x1 <= limit else " " + w.text)
        text = "".join(parts)
        sizes = {w.size for w in words}
        if len(sizes) == 1:
            size = first.size
        else:  # the size most characters have; on a tie the leftmost
            counts: dict[float, int] = {}
            for w in words:
                counts[w.size] = counts.get(w.size, 0) + w.chars
            size = max(counts.items(), key=lambda kv: kv[1])[0]
        bold_chars = sum([w.chars for w in words if w.bold])
        chars = sum([w.chars for w in words])
        top = min([w.top for w in words])
        bottom = max([w.bottom for w in words])
        x1 = max([w.x1 for w in words])
    text = text.strip()
    if "\u0300" in text:
        text = _TEX_GRAVE.sub("\u2018", text)
    return Line(
        text=text,
        top=top,
        bottom=bottom,
        x0=first.x0,
        x1=x1,
        size=round(size, 1),
        bold=bold_chars >= 0.8 * chars if chars else False,
        chars=chars,
        words=words,
    )


def make_lines(words: list[Word], columns: WordColumns | None = None) -> list[Line]:
    """Group words into lines, top to bottom; text that is not upright comes last.

    Words sorted by vertical centre, then x0; a word joins the current line when its
    centre lies within 0.35 times the larger of its own height and the line's first
    word's height from that first word's centre; each line's words are read left to
    right (line_from). The upright lines are computed with numpy over the whole page:
    Python work per word was most of this function's time (tests/test_pdf_text.py
    checks the result against the rule applied word by word). `columns`, when given,
    are the same words as arrays (pdf_text.WordColumns), so they are not taken apart
    word by word here.
    """
    if columns is None:
        upright = []
        other = []
        for w in words:
            if w.text.strip():
                (upright if w.upright else other).append(w)
        lines = _upright_lines(upright, _columns(upright)) if upright else []
    else:
        takes = columns.upright & ~columns.blank
        if takes.all():  # the usual page: every word upright and printable
            upright, other, cols = words, [], columns
        else:
            picked = np.flatnonzero(takes)
            upright = [words[i] for i in picked.tolist()]
            other = [words[i] for i in np.flatnonzero(~columns.upright & ~columns.blank).tolist()]
            cols = WordColumns(*(c[picked] for c in columns))
        lines = _upright_lines(upright, cols) if upright else []
    lines.sort(key=lambda ln: (ln.top, ln.x0))
    lines += [line_from([w]) for w in other]
    return lines


def _columns(words: list[Word]) -> WordColumns | None:
    """Words' fields as arrays (words from pdfminer, or filtered ones): one zip of the
    tuples gives every field's column."""
    if not words:
        return None
    c = list(zip(*words))
    return WordColumns(np.array(c[1]), np.array(c[2]), np.array(c[3]), np.array(c[4]), np.array(c[5]),
                       np.array(c[6], dtype=bool), np.array(c[8], dtype=np.int64), np.array(c[9], dtype=bool),
                       np.zeros(len(words), dtype=bool))


def _upright_lines(words: list[Word], cols: WordColumns) -> list[Line]:
    n = len(words)
    x0, x1, top, bottom, size, bold, chars = cols.x0, cols.x1, cols.top, cols.bottom, cols.size, cols.bold, cols.chars
    centre = (top + bottom) / 2
    # Sorted by (centre, x0); lexsort is stable, so equal keys keep the words' order.
    order = np.lexsort((x0, centre))
    cs = centre[order].tolist()
    hs = np.maximum(bottom - top, 0.1)[order].tolist()
    # The grouping depends on each line's first word: a loop, over plain floats.
    group = [0] * n
    g = -1
    c0 = h0 = 0.0
    for k in range(n):
        c, h = cs[k], hs[k]
        if g < 0 or not abs(c - c0) <= 0.35 * (h if h > h0 else h0):
            g += 1
            c0, h0 = c, h
        group[k] = g
    # Within a line, left to right (stable: equal x0 keep the centre order).
    pos = np.empty(n, dtype=np.int64)
    pos[order] = np.arange(n)
    gid = np.empty(n, dtype=np.int64)
    gid[order] = group
    final = np.lexsort((pos, x0, gid))
    ws = [words[i] for i in final.tolist()]
    gids = gid[final]
    starts = np.flatnonzero(np.r_[True, gids[1:] != gids[:-1]])
    ends = np.r_[starts[1:], n]

    fx0, x1, size, chars, bold = x0[final], x1[final], size[final], chars[final], bold[final]
    # Pieces that touch (a superscript, a change of font inside a word) join.
    prev_size = size[:-1]
    larger = np.where(size[1:] > prev_size, size[1:], np.where(prev_size != 0, prev_size, 1.0))
    touch = np.r_[True, fx0[1:] - x1[:-1] <= _TOUCH * larger]
    # (A line's first piece may get a space here: the line's text is stripped.)
    pieces = [w.text if t else " " + w.text for w, t in zip(ws, touch.tolist())]
    tops = np.minimum.reduceat(top[final], starts).tolist()
    bottoms = np.maximum.reduceat(bottom[final], starts).tolist()
    x1s = np.maximum.reduceat(x1, starts).tolist()
    n_chars = np.add.reduceat(chars, starts).tolist()
    n_bold = np.add.reduceat(np.where(bold, chars, 0), starts).tolist()
    one_size = (np.minimum.reduceat(size, starts) == np.maximum.reduceat(size, starts)).tolist()
    out = []
    for a, b, t, u, r, nc, nb, same in zip(starts.tolist(), ends.tolist(), tops, bottoms, x1s, n_chars,
                                          n_bold, one_size):
        lw = ws[a:b]
        if same:
            sz = lw[0].size
        else:  # the size most characters have; on a tie the leftmost
            counts: dict[float, int] = {}
            for w in lw:
                counts[w.size] = counts.get(w.size, 0) + w.chars
            sz = max(counts.items(), key=lambda kv: kv[1])[0]
        text = "".join(pieces[a:b]).strip()
        if "\u0300" in text:
            text = _TEX_GRAVE.sub("\u2018", text)
        out.append(Line(text, t, u, lw[0].x0, r, round(sz, 1), nb >= 0.8 * nc if nc else False, nc, lw))
    return out


# --- columns ----------------------------------------------------------------


def _fills(parts: list[tuple[float, float]], left: float, right: float) -> bool:
    """Half of the line parts reach FILL_SHARE of the column's width."""
    width = right - left
    if width <= 0 or not parts:
        return False
    spans = sorted(x1 - x0 for x0, x1 in parts)
    return spans[len(spans) // 2] >= FILL_SHARE * width


def find_gutters(lines: list[Line], em: float) -> list[tuple[float, float]]:
    """Vertical strips that separate columns of text on this page (left to right)."""
    lines = [ln for ln in lines if ln.words and ln.words[0].upright]
    n = len(lines)
    if n < 6 or em <= 0:
        return []
    # The words' edges: one zip of the word tuples (a field read per word and edge was
    # about half of this function's time, py-spy).
    _, x0s, x1s = list(zip(*[w for ln in lines for w in ln.words]))[:3]
    xs0 = min(x0s)
    xs1 = max(x1s)
    if xs1 - xs0 < 2 * COLUMN_EM * em:
        return []
    bins = int(xs1 - xs0) + 2
    # Each word covers the whole points from its left edge (rounded down) to its right
    # edge (rounded up); x - xs0 >= 0, so truncation rounds down. (bincount: np.add.at
    # took 0.07 ms a call under cProfile.)
    diff = (np.bincount((np.array(x0s) - xs0).astype(np.int64), minlength=bins + 1)
            - np.bincount(np.ceil(np.array(x1s) - xs0).astype(np.int64), minlength=bins + 1))
    coverage = np.cumsum(diff)[:bins]
    free = coverage <= SPANNING_SHARE * n
    lo = int(COLUMN_EM * em)
    hi = bins - int(COLUMN_EM * em)
    if hi <= lo:
        return []
    # Runs of free points between lo and hi: where the padded mask turns on and off.
    edges = np.flatnonzero(np.diff(np.concatenate(([False], free[lo:hi], [False])))).tolist()
    wide = max(GUTTER_EM * em, 3.0)
    runs = [(xs0 + (lo + a), xs0 + (lo + b)) for a, b in zip(edges[0::2], edges[1::2]) if b - a >= wide]
    accepted = runs
    for _ in range(2):  # validate against the neighbours that remain
        kept = []
        for k, (g0, g1) in enumerate(accepted):
            left_edge = accepted[k - 1][1] if k > 0 else xs0
            right_edge = accepted[k + 1][0] if k + 1 < len(accepted) else xs1
            left_parts, right_parts = [], []
            for ln in lines:
                if any(w.x0 < g1 - 0.5 and w.x1 > g0 + 0.5 for w in ln.words):
                    continue  # text in the strip: the line spans the columns
                lw = [w for w in ln.words if left_edge - 0.5 <= w.x0 and w.x1 <= g0 + 0.5]
                rw = [w for w in ln.words if g1 - 0.5 <= w.x0 and w.x1 <= right_edge + 0.5]
                if lw:
                    left_parts.append((min(w.x0 for w in lw), max(w.x1 for w in lw)))
                if rw:
                    right_parts.append((min(w.x0 for w in rw), max(w.x1 for w in rw)))
            need = max(3, n // 5)
            if (
                len(left_parts) >= need
                and len(right_parts) >= need
                and _fills(left_parts, min(p[0] for p in left_parts), g0)
                and _fills(right_parts, g1, max(p[1] for p in right_parts))
            ):
                kept.append((g0, g1))
        if kept == accepted:
            break
        accepted = kept
    return accepted


def _usual_left(lines: list[Line]) -> float:
    counts = Counter(round(ln.x0) for ln in lines)
    return float(counts.most_common(1)[0][0]) if counts else 0.0


def order_columns(lines: list[Line], gutters: list[tuple[float, float]]) -> list[Line]:
    """Reading order: band by band, each band's columns one after the other."""
    if not gutters:
        margin = _usual_left(lines)
        for ln in lines:
            ln.column = 0
            ln.indent = ln.x0 - margin
        return lines
    mids = [(g0 + g1) / 2 for g0, g1 in gutters]
    out: list[Line] = []
    band: dict[int, list[Line]] = defaultdict(list)

    def flush() -> None:
        for col in sorted(band):
            out.extend(sorted(band[col], key=lambda ln: (ln.top, ln.x0)))
        band.clear()

    ordered = sorted([ln for ln in lines if ln.words and ln.words[0].upright],
                     key=lambda ln: (ln.top, ln.x0))
    rest = [ln for ln in lines if not (ln.words and ln.words[0].upright)]
    for ln in ordered:
        crosses = any(w.x0 < g1 - 0.5 and w.x1 > g0 + 0.5 for w in ln.words for g0, g1 in gutters)
        if crosses:
            flush()
            ln.column = -1
            out.append(ln)
            continue
        by_col: dict[int, list[Word]] = defaultdict(list)
        for w in ln.words:
            by_col[bisect_right(mids, (w.x0 + w.x1) / 2)].append(w)
        for col, ws in by_col.items():
            part = line_from(ws)
            part.column = col
            band[col].append(part)
    flush()
    by_column: dict[int, list[Line]] = defaultdict(list)
    for ln in out:
        by_column[ln.column].append(ln)
    for col, members in by_column.items():
        margin = _usual_left(members)
        for ln in members:
            ln.indent = ln.x0 - margin
    return out + rest


# --- running headers and footers ------------------------------------------------


def _repeat_key(text: str) -> str:
    return _DIGITS.sub("#", " ".join(text.split())).casefold()


def removal_kind(text: str, top_half: bool) -> str:
    if _PAGE_NUMBER.match(text.strip()):
        return "page number"
    return "running header" if top_half else "running footer"


_RUNNING_LABEL = re.compile(
    r"^\W*(?:[\divxlc]+\s+)?(?:chapter|section|appendix|part|kapitel|chapitre|cap[ií]tulo|anhang|annexe)"
    r"\s+(?:\d+|[ivxlc]+|[a-z])\b",
    re.IGNORECASE,
)


def _loose(text: str) -> str:
    return "".join(ch for ch in text.casefold() if ch.isalpha())


_SECTION_NUMBER = re.compile(r"^\W*(?:\d+(?:\.\d+)*|[A-Z](?:\.\d+)+)\.?\s+")


def _exact(text: str) -> str:
    return "".join(ch for ch in _SECTION_NUMBER.sub("", text).casefold() if ch.isalnum())


def follows_document(text: str, titles: set[str] | tuple[str, ...], exact: set[str] = frozenset()) -> bool:
    """True when a header/footer line's text is a chapter or section label with a number
    ("CHAPTER 7. BASICS OF ...", "12 Chapter 2. The Debian Archive"), or starts or ends
    with a title the document's outline or metadata names (digits aside) -- but not
    when it is that title and nothing more (`exact`: a section's own heading that
    happens to open a page). `titles` as a tuple: those of 8 or more letters,
    picked by the caller once for many calls."""
    if _exact(text) in exact:
        return False
    if _RUNNING_LABEL.match(text):
        return True
    loose = _loose(text)
    # One startswith/endswith over a tuple, in C (a document's outline has hundreds).
    long = tuple(t for t in titles if len(t) >= 8) if not isinstance(titles, tuple) else titles
    return bool(long) and (loose.startswith(long) or loose.endswith(long))


def drop_running_lines(pages: list[tuple[float, list[Line]]],
                       titles: list[str] | None = None) -> list[list[dict]]:
    """Remove header/footer lines that recur at the same height on most pages.

    `pages` holds (page height, lines sorted top to bottom) of each text page; the
    lines lists are edited in place. Returns, per page, the removals made. With
    `titles` (outline entries, the document title), a line that varies from page to
    page is removed too when its height recurs on most pages and its text follows the
    document (follows_document).
    """
    removed: list[list[dict]] = [[] for _ in pages]
    if len(pages) < 2:
        return removed
    loose_titles = tuple(t for t in {_loose(t) for t in (titles or [])} if len(t) >= 8)
    exact_titles = {_exact(t) for t in (titles or [])}
    candidates: list[list[tuple[Line, str]]] = []
    seen: dict[str, list[tuple[int, float]]] = defaultdict(list)
    heights: list[tuple[int, float]] = []
    for n, (height, lines) in enumerate(pages):
        picked = []
        edge = lines[:2] + [ln for ln in lines[-2:] if ln not in lines[:2]]
        for ln in edge:
            if ln.top <= MARGIN_SHARE * height or ln.bottom >= (1 - MARGIN_SHARE) * height:
                key = _repeat_key(ln.text)
                picked.append((ln, key))
                seen[key].append((n, ln.top))
                heights.append((n, ln.top))
        candidates.append(picked)
    total = len(pages)
    need = max(2, (total + 1) // 2)
    slots: dict[float, int] = {}
    for n, (height, lines) in enumerate(pages):
        drop = []
        for ln, key in candidates[n]:
            hits = {m for m, top in seen[key] if abs(top - ln.top) <= REPEAT_Y_TOLERANCE}
            if len(hits) >= need:
                drop.append(ln)
                kind = removal_kind(ln.text, ln.top < height / 2)
                removed[n].append({
                    "kind": kind,
                    "text": ln.text,
                    "reason": f"{kind}: the same line (digits aside) stands at this height "
                              f"on {len(hits)} of {total} pages",
                })
                continue
            if titles is None or not follows_document(ln.text, loose_titles, exact_titles):
                continue
            # The pages with an edge line at this height: the same for every line at
            # this top (a running header stands at one height), so worked out once per
            # top; each was a walk over every page's edge lines (0.4 ms a page on the
            # Debian PDFs of `bench goals`, more the longer the document).
            if ln.top not in slots:
                slots[ln.top] = len({m for m, top in heights if abs(top - ln.top) <= REPEAT_Y_TOLERANCE})
            slot = slots[ln.top]
            if slot >= need:
                drop.append(ln)
                kind = "running header" if ln.top < height / 2 else "running footer"
                removed[n].append({
                    "kind": kind,
                    "text": ln.text,
                    "reason": f"{kind}: a chapter or section label or title at a height "
                              f"where header lines stand on {slot} of {total} pages",
                })
        if drop:
            lines[:] = [ln for ln in lines if all(ln is not d for d in drop)]
    return removed


# --- hyphenated line ends ----------------------------------------------------


@dataclass
class Vocabulary:
    """How often the document writes each word joined and each compound hyphenated."""

    joined: Counter = field(default_factory=Counter)
    hyphenated: Counter = field(default_factory=Counter)

    def add(self, text: str) -> None:
        # Counted in C over the whole list, then the few compounds moved across (a
        # generator per token fed both counters one by one).
        counts = Counter(_WORDS.findall(text.casefold()))
        for compound in [t for t in counts if "-" in t]:
            self.hyphenated[compound] += counts.pop(compound)
        self.joined.update(counts)


_TAIL = re.compile(r"([^\W\d_]+)-$")
_HEAD = re.compile(r"^([^\W\d_]+)")


def join_lines(current: str, line: str, vocab: Vocabulary | None = None) -> str:
    """Append a line to a paragraph, deciding what a line-end hyphen means."""
    if not current:
        return line
    if current.endswith("\u00ad"):
        return current[:-1] + line
    if not current.endswith("-"):
        return f"{current} {line}"
    tail = _TAIL.search(current)
    head = _HEAD.match(line)
    if not tail or not head:
        # "1-" + "2", "-" alone, a hyphen before punctuation: no word to join.
        if len(current) >= 2 and current[-2].isalnum() and line[:1].isalnum():
            return current + line
        return f"{current} {line}"
    a, b = tail.group(1), head.group(1)
    joined = (a + b).casefold()
    compound = f"{a}-{b}".casefold()
    n_joined = vocab.joined[joined] if vocab else 0
    n_hyphenated = vocab.hyphenated[compound] if vocab else 0
    if n_hyphenated > n_joined:
        keep = True
    elif n_joined > n_hyphenated:
        keep = False
    else:
        keep = not (b[0].islower() or (a[-1].isupper() and b.isupper()))
    return current + line if keep else current[:-1] + line
