"""Ruled tables, found by pdfplumber's table finder: for PDFs PDFium cannot open.

pdfplumber parses a page's every character and line in Python (50-600 ms a page on
the Debian documentation PDFs), so PDFs PDFium opens get their tables from pdf_grid;
this finder serves the pdfminer route and is pdf_grid's reference in the tests. Its
"lines" strategy builds cells from ruling lines and rectangle edges; a grid of at least
2 x 2 cells holding text is a table (a single framed box is not). Cell text uses the
same word gap as the running text.
"""

from __future__ import annotations

from dataclasses import dataclass

from .blocks import table_shape

# A gap wider than this share of the font size between two characters is a word
# break (the same rule as pdf_text.WORD_GAP; pdfplumber's own default is 3 pt).
TEXT_SETTINGS = {"x_tolerance_ratio": 0.1}


@dataclass
class FoundTable:
    top: float
    bbox: tuple[float, float, float, float]  # x0, top, x1, bottom (points from the top)
    rows: list[list[str]]


def tables_on(page) -> list[FoundTable]:
    """The tables pdfplumber finds on one of its pages: two rows and two columns at least."""
    found = []
    for table in page.find_tables():
        rows = table.extract(**TEXT_SETTINGS)
        n_rows, n_cols = table_shape(rows)
        if n_rows >= 2 and n_cols >= 2:
            x0, top, x1, bottom = (float(v) for v in table.bbox)
            found.append(FoundTable(top=top, bbox=(x0, top, x1, bottom), rows=rows))
    return found


def inside(x0: float, top: float, x1: float, bottom: float,
           boxes: list[tuple[float, float, float, float]]) -> bool:
    """Whether the centre of a box lies in one of the tables' boxes."""
    cx = (x0 + x1) / 2
    cy = (top + bottom) / 2
    return any(bx0 <= cx <= bx1 and btop <= cy <= bbottom for bx0, btop, bx1, bbottom in boxes)
