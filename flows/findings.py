"""Where in its page a personal-data finding of a chunk lies (for `thresher trail`).

The personal step records each finding's span in the chunk text. A chunk's text
after its prefix is one slice of the document text (the split step's pages joined
by units.BLOCK_SEP), starting at `char_start` of `page_start`; so a span maps back
to a page and an offset in that page's text.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass

from thresher.steps.units import BLOCK_SEP


@dataclass(frozen=True)
class PlacedFinding:
    kind: str
    page: int | None  # None: a format without pages
    start: int  # offsets in that page's text (of the file's, without pages)
    end: int
    in_prefix: bool  # inside a repeated table header, not the chunk's own span


def place(findings: list[dict], chunk: dict, pages: list[tuple[int | None, str]]) -> list[PlacedFinding]:
    """Findings of one chunk (kind, start, end in its text) as page offsets.

    `pages` are the (page number, text) of the document's pages split read, in order.
    """
    starts, pos = [], 0
    for _, text in pages:
        starts.append(pos)
        pos += len(text) + len(BLOCK_SEP)
    numbers = [n for n, _ in pages]
    try:
        first = numbers.index(chunk.get("page_start"))
    except ValueError:
        first = 0
    base = (starts[first] if starts else 0) + (chunk.get("char_start") or 0)
    prefix = chunk.get("prefix_chars") or 0
    out = []
    for f in findings:
        if f["start"] < prefix:
            out.append(PlacedFinding(f["kind"], chunk.get("page_start"), f["start"], f["end"], True))
            continue
        p = base + f["start"] - prefix
        i = max(0, bisect.bisect_right(starts, p) - 1)
        offset = starts[i] if starts else 0
        out.append(PlacedFinding(f["kind"], numbers[i] if numbers else None, p - offset,
                                 p - offset + f["end"] - f["start"], False))
    return out
