"""Text comparison for the review page, as plain data (no HTML here).

`diff_segments` lines up two texts; `Pane` turns one side into pieces the templates
draw: plain text, removed or inserted runs, and visible marks for invisible characters.
"""

from __future__ import annotations

import difflib
import re
import unicodedata
from dataclasses import dataclass, field

# A pane shows at most this much text; the rest is counted, not shown (thresher trail --text has it all).
MAX_PANE_CHARS = 60_000
# Word-level comparison inside a changed block of lines only up to this many tokens a side.
MAX_WORD_DIFF_TOKENS = 4_000

_TOKEN = re.compile(r"\w+|\s+|[^\w\s]", re.UNICODE)
_INVISIBLE = {"Cc", "Cf", "Co", "Cn", "Zl", "Zp", "Zs"}


def _word_ops(a: str, b: str) -> list[tuple[str, str, str]]:
    ta, tb = _TOKEN.findall(a), _TOKEN.findall(b)
    if len(ta) > MAX_WORD_DIFF_TOKENS or len(tb) > MAX_WORD_DIFF_TOKENS:
        return [("replace", a, b)]
    sm = difflib.SequenceMatcher(None, ta, tb, autojunk=False)
    return [(op, "".join(ta[i1:i2]), "".join(tb[j1:j2])) for op, i1, i2, j1, j2 in sm.get_opcodes()]


def diff_segments(a: str, b: str) -> list[tuple[str, str, str]]:
    """(op, text in a, text in b) with op equal | delete | insert | replace.

    Lines first (fast, and most lines of a page are unchanged), then words inside each
    changed block of lines, so a changed character does not mark a whole line.
    """
    if a == b:
        return [("equal", a, b)]
    la, lb = a.splitlines(keepends=True), b.splitlines(keepends=True)
    sm = difflib.SequenceMatcher(None, la, lb, autojunk=len(la) + len(lb) > 20_000)
    out: list[tuple[str, str, str]] = []
    for op, i1, i2, j1, j2 in sm.get_opcodes():
        sa, sb = "".join(la[i1:i2]), "".join(lb[j1:j2])
        if op == "replace":
            out.extend(_word_ops(sa, sb))
        else:
            out.append((op, sa, sb))
    merged: list[tuple[str, str, str]] = []
    for seg in (piece for seg in out for piece in _trim(seg)):
        if seg[1] == "" and seg[2] == "":
            continue
        if merged and merged[-1][0] == seg[0] == "equal":
            merged[-1] = ("equal", merged[-1][1] + seg[1], merged[-1][2] + seg[2])
        else:
            merged.append(seg)
    return merged


def _trim(seg: tuple[str, str, str]) -> list[tuple[str, str, str]]:
    """Split what both sides of a replaced span share at its ends off as unchanged text."""
    op, a, b = seg
    if op != "replace":
        return [seg]
    p = 0
    while p < min(len(a), len(b)) and a[p] == b[p]:
        p += 1
    q = 0
    while q < min(len(a), len(b)) - p and a[len(a) - 1 - q] == b[len(b) - 1 - q]:
        q += 1
    mid_a, mid_b = a[p:len(a) - q], b[p:len(b) - q]
    kind = "replace" if mid_a and mid_b else ("delete" if mid_a else "insert")
    out = [("equal", a[:p], b[:p])] if p else []
    out.append((kind, mid_a, mid_b))
    if q:
        out.append(("equal", a[len(a) - q:], b[len(b) - q:]))
    return out


def visible_runs(text: str) -> list[tuple[str, str]]:
    """A removed or inserted span as (kind, text) runs: kind "t" is text as it is, "nl" a
    line break, "tab" a tab, "cp" an invisible character (its text is the code point label)."""
    out: list[tuple[str, str]] = []
    plain: list[str] = []
    for ch in text:
        if ch == "\n":
            kind, label = "nl", "\n"
        elif ch == "\t":
            kind, label = "tab", "\t"
        elif ch != " " and unicodedata.category(ch) in _INVISIBLE:
            kind, label = "cp", f"U+{ord(ch):04X}"
        else:
            plain.append(ch)
            continue
        if plain:
            out.append(("t", "".join(plain)))
            plain = []
        out.append((kind, label))
    if plain:
        out.append(("t", "".join(plain)))
    return out


@dataclass
class Piece:
    mark: str  # "" (unchanged) | "del" | "ins"
    text: str
    runs: list[tuple[str, str]] = field(default_factory=list)  # for marked pieces


@dataclass
class Pane:
    """One side of a comparison, stopping after `limit` characters."""

    limit: int = MAX_PANE_CHARS
    pieces: list[Piece] = field(default_factory=list)
    shown: int = 0
    hidden: int = 0

    def add(self, text: str, mark: str = "") -> None:
        if not text:
            return
        room = self.limit - self.shown
        if room <= 0:
            self.hidden += len(text)
            return
        piece, rest = text[:room], text[room:]
        self.shown += len(piece)
        self.hidden += len(rest)
        self.pieces.append(Piece(mark, piece, visible_runs(piece) if mark else []))


def comparison(before: str, after: str) -> tuple[Pane, Pane, int, int]:
    """Both panes of a side-by-side comparison and the characters removed and inserted."""
    left, right = Pane(), Pane()
    removed = inserted = 0
    for op, sa, sb in diff_segments(before, after):
        if op == "equal":
            left.add(sa)
            right.add(sb)
        else:
            left.add(sa, "del")
            right.add(sb, "ins")
            removed += len(sa)
            inserted += len(sb)
    return left, right, removed, inserted


def single(text: str) -> Pane:
    pane = Pane()
    pane.add(text)
    return pane
