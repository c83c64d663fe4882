"""Ruled tables from a page's ruling lines (read through PDFium) and its PDFium words.

The same method as pdfplumber's "lines" table finder (its table.py, after Anssi
Nurminen's thesis), on edges pdf_text reads from the page's path objects instead of
pdfminer's: straight axis-parallel path segments and rectangle sides become edges;
edges within SNAP points of one line are moved onto their mean line and joined where
they overlap or nearly touch; every crossing of a horizontal and a vertical edge is a
corner; the smallest rectangles of corners joined by edges are cells; cells sharing a
corner form one table (one lone cell, a framed box, is not a table). A word belongs to
the cell holding its centre. tests/test_pdf_grid.py checks the tables against
pdfplumber's own on real ruled pages; pdfplumber stays the reader for PDFs PDFium
cannot open (pdf_tables.py).
"""

from __future__ import annotations

from collections import defaultdict
from typing import Iterable

import numpy as np

from .pdf_tables import FoundTable
from .pdf_text import Word

# pdfplumber's defaults (table.py: snap, join and intersection tolerance 3 points; edges
# shorter than 1 point are dropped before merging, shorter than 3 after).
SNAP = 3.0
JOIN = 3.0
CROSS = 3.0
MIN_BEFORE = 1.0
MIN_AFTER = 3.0
# Words of one cell whose tops differ by at most this many points are one line
# (pdfplumber's y_tolerance for extract_text).
LINE_TOLERANCE = 3.0

Edge = tuple[str, float, float, float, float]  # orientation "h"|"v", x0, top, x1, bottom


def _snap(edges: list[list[float]], key: int, other: int) -> None:
    """Move edges whose `key` coordinates chain within SNAP onto their mean (in place)."""
    if not edges:
        return
    values = sorted({e[key] for e in edges})
    groups: list[list[float]] = [[values[0]]]
    for v in values[1:]:
        if v <= groups[-1][-1] + SNAP:
            groups[-1].append(v)
        else:
            groups.append([v])
    group_of = {v: i for i, g in enumerate(groups) for v in g}
    members: dict[int, list[list[float]]] = defaultdict(list)
    for e in edges:
        members[group_of[e[key]]].append(e)
    for group in members.values():
        mean = sum(e[key] for e in group) / len(group)
        for e in group:
            e[key] = e[other] = mean


def _join(edges: list[list[float]], line: int, lo: int, hi: int) -> list[list[float]]:
    """Join edges on one line that overlap or lie within JOIN of each other."""
    out: list[list[float]] = []
    by_line: dict[float, list[list[float]]] = defaultdict(list)
    for e in edges:
        by_line[e[line]].append(e)
    for at in sorted(by_line):
        group = sorted(by_line[at], key=lambda e: e[lo])
        joined = [list(group[0])]
        for e in group[1:]:
            last = joined[-1]
            if e[lo] <= last[hi] + JOIN:
                last[hi] = max(last[hi], e[hi])
            else:
                joined.append(list(e))
        out.extend(joined)
    return out


def merge_edges(edges: Iterable[Edge]) -> tuple[list[list[float]], list[list[float]]]:
    """Horizontal and vertical edges, snapped, joined and long enough: [x0, top, x1, bottom]."""
    hs = [[x0, t, x1, b] for o, x0, t, x1, b in edges if o == "h" and x1 - x0 >= MIN_BEFORE]
    vs = [[x0, t, x1, b] for o, x0, t, x1, b in edges if o == "v" and b - t >= MIN_BEFORE]
    _snap(hs, 1, 3)
    _snap(vs, 0, 2)
    hs = [e for e in _join(hs, 1, 0, 2) if e[2] - e[0] >= MIN_AFTER]
    vs = [e for e in _join(vs, 0, 1, 3) if e[3] - e[1] >= MIN_AFTER]
    return hs, vs


def find_cells(hs: list[list[float]], vs: list[list[float]]) -> list[tuple[float, float, float, float]]:
    """The smallest rectangles whose four corners are crossings joined by edges."""
    h_at: dict[tuple[float, float], set[int]] = defaultdict(set)
    v_at: dict[tuple[float, float], set[int]] = defaultdict(set)
    for vi, v in sorted(enumerate(vs), key=lambda p: (p[1][0], p[1][1])):
        for hi, h in enumerate(hs):
            if v[1] <= h[1] + CROSS and v[3] >= h[1] - CROSS and h[0] - CROSS <= v[0] <= h[2] + CROSS:
                pt = (v[0], h[1])
                h_at[pt].add(hi)
                v_at[pt].add(vi)
    points = sorted(h_at)
    by_x: dict[float, list[tuple[float, float]]] = defaultdict(list)
    by_y: dict[float, list[tuple[float, float]]] = defaultdict(list)
    for p in points:  # sorted, so each list is in order
        by_x[p[0]].append(p)
        by_y[p[1]].append(p)
    crossing = set(points)

    def same_v(a, b) -> bool:
        return bool(v_at[a] & v_at[b])

    def same_h(a, b) -> bool:
        return bool(h_at[a] & h_at[b])

    cells = []
    for pt in points:
        below = [p for p in by_x[pt[0]] if p[1] > pt[1]]
        right = [p for p in by_y[pt[1]] if p[0] > pt[0]]
        found = None
        for b in below:
            if not same_v(pt, b):
                continue
            for r in right:
                if not same_h(pt, r):
                    continue
                corner = (r[0], b[1])
                if corner in crossing and same_v(corner, r) and same_h(corner, b):
                    found = (pt[0], pt[1], corner[0], corner[1])
                    break
            if found:
                break
        if found:
            cells.append(found)
    return cells


def group_cells(cells: list[tuple[float, float, float, float]]) -> list[list[tuple[float, float, float, float]]]:
    """Cells sharing a corner, grouped into tables (in pdfplumber's order); lone cells dropped."""
    remaining = list(cells)
    tables = []
    corners: set[tuple[float, float]] = set()
    current: list[tuple[float, float, float, float]] = []
    while remaining:
        before = len(current)
        for cell in list(remaining):
            x0, t, x1, b = cell
            cc = ((x0, t), (x0, b), (x1, t), (x1, b))
            if not current or any(c in corners for c in cc):
                corners.update(cc)
                current.append(cell)
                remaining.remove(cell)
        if len(current) == before:
            tables.append(current)
            corners, current = set(), []
    if current:
        tables.append(current)
    tables.sort(key=lambda t: min((c[1], c[0]) for c in t))
    return [t for t in tables if len(t) > 1]


def _cell_text(words: list[Word]) -> str:
    lines: list[list[Word]] = []
    for w in sorted(words, key=lambda w: (w.top, w.x0)):
        if lines and w.top <= lines[-1][0].top + LINE_TOLERANCE:
            lines[-1].append(w)
        else:
            lines.append([w])
    return "\n".join(" ".join(w.text for w in sorted(line, key=lambda w: w.x0)) for line in lines)


def table_rows(cells: list[tuple[float, float, float, float]], words: list[Word]) -> list[list[str | None]]:
    """Rows of cell texts; None where a cell of another row spans this column's start."""
    xs = sorted({c[0] for c in cells})
    by_top: dict[float, dict[float, tuple]] = defaultdict(dict)
    for c in sorted(cells, key=lambda c: (c[1], c[0])):
        by_top[c[1]][c[0]] = c
    in_cell: dict[tuple, list[Word]] = defaultdict(list)
    cell_list = list(cells)
    if words and cell_list:
        # Each word's first cell (in the cells' order) holding its centre, for all the
        # page's words and cells at once: a Python loop over both was 0.4 ms a page
        # on the goals' PDFs, more than the rest of the grid.
        x0, x1, top, bottom = (np.array(col) for col in list(zip(*words))[1:5])
        cx, cy = ((x0 + x1) / 2)[:, None], ((top + bottom) / 2)[:, None]
        box = np.array(cell_list, dtype=np.float64)
        holds = (box[:, 0] <= cx) & (cx < box[:, 2]) & (box[:, 1] <= cy) & (cy < box[:, 3])
        first = holds.argmax(axis=1).tolist()
        for k in np.flatnonzero(holds.any(axis=1)).tolist():
            in_cell[cell_list[first[k]]].append(words[k])
    rows = []
    for top in sorted(by_top):
        row = by_top[top]
        rows.append([None if x not in row else _cell_text(in_cell.get(row[x], [])) for x in xs])
    return rows


def find_tables(edges: Iterable[Edge], words: list[Word]) -> list[FoundTable]:
    """Ruled tables of at least two rows and two columns, with their cells' text."""
    from .blocks import table_shape

    hs, vs = merge_edges(edges)
    if len(hs) < 2 or len(vs) < 2:
        return []
    found = []
    for cells in group_cells(find_cells(hs, vs)):
        rows = table_rows(cells, words)
        n_rows, n_cols = table_shape(rows)
        if n_rows >= 2 and n_cols >= 2:
            bbox = (min(c[0] for c in cells), min(c[1] for c in cells),
                    max(c[2] for c in cells), max(c[3] for c in cells))
            found.append(FoundTable(top=bbox[1], bbox=bbox, rows=rows))
    return found
