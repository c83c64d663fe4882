"""A PDF page's text layer read through PDFium: words with their box, size and weight.

Why PDFium and not pdfminer for the characters: pdfminer (under pdfplumber) parses
every character in Python, 50-600 ms a page on the Debian documentation PDFs; PDFium's
text page is built in C++ and each character costs one ctypes call here (about 1 us),
so a page of 2 000 characters is read in a few milliseconds (bench/extract.py).

What one page gives (`PageText`):
- words: runs of characters between spaces (real ones or the ones PDFium generates at
  a gap), also broken where the gap to the previous character exceeds WORD_GAP of the
  font size (the measurement behind 0.1 is in pdf.py's docstring) or where the
  text jumps to another line; each word has its box in points from the top of the page,
  its font size (the Tf size times the text matrix' vertical scale, so scaled text
  counts at the size it is drawn), and whether its font is bold (the base font name,
  PDFium's weight, or the ForceBold flag). PDFium marks a hyphen that ends a line
  (U+0002 from FPDFText_GetUnicode, U+FFFE in FPDFText_GetText): it becomes "-" with
  `hyphen` set, and the joining is decided later (pdf_layout.join_lines).
- text objects that are not text: images (their share of the page, for scans), and
  whether the page's vector paths could form a ruled table (at least three distinct
  horizontal and three distinct vertical edges, as a 2 x 2 grid needs; or one path with
  many segments spanning an area, which may draw a whole grid); only on such pages are
  the straight segments of the paths read as `edges` for the table finder (pdf_grid).
- `unmapped`: characters PDFium flags as having no Unicode mapping (glyph ids only).

Every PDFium call is made while holding LOCK (PDFium is not thread-safe; pypdfium2's
documentation says so), taken by the caller around a whole page.
"""

from __future__ import annotations

import ctypes
import re
import threading
from dataclasses import dataclass, field

import numpy as np
import pypdfium2 as pdfium
import pypdfium2.raw as raw

# PDFium is not thread-safe; the flows layer may run extraction in threads. A lock per
# process: a child process of the time-limit guard starts with its own, unheld.
LOCK = threading.RLock()

WORD_GAP = 0.1
# A loose box (ascent to descent) is about 1.05-1.17 times the font size for the base
# fonts (Helvetica 1.17, Times 1.14, Courier 1.05, measured with PDFium here); the word
# gap is judged against the size this implies before the size itself is looked up.
BOX_PER_SIZE = 1.15

_BOLD = re.compile(r"bold|black|heavy|semibold|demibold|demi\b|extrabold|ultrabold|\bbd\b",
                   re.IGNORECASE)
_FORCE_BOLD = 1 << 18  # PDF font descriptor flag 19 (PDF 1.7, table 123)
_HYPHEN_MARKS = {"\x02", "\ufffe"}
_SPACES = {" ", "\t", "\r", "\n", "\x00", "\xa0", "\u2002", "\u2003", "\u2009", "\u3000"}

PAGEOBJ_TEXT = raw.FPDF_PAGEOBJ_TEXT
PAGEOBJ_PATH = raw.FPDF_PAGEOBJ_PATH
PAGEOBJ_IMAGE = raw.FPDF_PAGEOBJ_IMAGE
PAGEOBJ_FORM = raw.FPDF_PAGEOBJ_FORM


@dataclass(slots=True)
class Word:
    text: str
    x0: float
    x1: float
    top: float
    bottom: float
    size: float = 0.0
    bold: bool = False
    hyphen: bool = False  # ends in a hyphen the text layer marks as a line-end break
    chars: int = 0
    upright: bool = True


@dataclass
class PageText:
    width: float
    height: float
    words: list[Word] = field(default_factory=list)
    visible_chars: int = 0
    unmapped: int = 0
    image_share: float = 0.0
    images: int = 0
    ruled: bool = False
    # On a ruled page: its straight axis-parallel path segments ("h"|"v", x0, top, x1,
    # bottom in points from the top), for pdf_grid's table finder.
    edges: list[tuple[str, float, float, float, float]] = field(default_factory=list)


def _font_facts(font) -> tuple[bool, str]:
    name = ctypes.create_string_buffer(256)
    n = raw.FPDFFont_GetBaseFontName(font, name, 256)
    base = name.value.decode("latin-1", "replace") if n else ""
    weight = raw.FPDFFont_GetWeight(font)
    flags = raw.FPDFFont_GetFlags(font)
    bold = bool(_BOLD.search(base.split("+", 1)[-1])) or weight >= 600 or bool(flags & _FORCE_BOLD)
    return bold, base


_IDENTITY = (1.0, 0.0, 0.0, 1.0, 0.0, 0.0)


def _matrix(obj) -> tuple[float, ...]:
    m = raw.FS_MATRIX()
    if not raw.FPDFPageObj_GetMatrix(obj, ctypes.byref(m)):
        return _IDENTITY
    return (m.a, m.b, m.c, m.d, m.e, m.f)


def _then(m: tuple[float, ...], outer: tuple[float, ...]) -> tuple[float, ...]:
    """The matrix applying m first, then outer (PDF's row-vector convention)."""
    a, b, c, d, e, f = m
    A, B, C, D, E, F = outer
    return (a * A + b * C, a * B + b * D, c * A + d * C, c * B + d * D, e * A + f * C + E, e * B + f * D + F)


def _page_objects(page_raw):
    """(type, object, matrix of the forms around it) of every non-text page object."""
    stack = [(raw.FPDFPage_CountObjects(page_raw), lambda i: raw.FPDFPage_GetObject(page_raw, i), _IDENTITY)]
    out = []
    while stack:
        count, get, outer = stack.pop()
        for i in range(count):
            obj = get(i)
            kind = raw.FPDFPageObj_GetType(obj)
            if kind == PAGEOBJ_FORM:
                stack.append((raw.FPDFFormObj_CountObjects(obj),
                              lambda j, o=obj: raw.FPDFFormObj_GetObject(o, j), _then(_matrix(obj), outer)))
            elif kind != PAGEOBJ_TEXT:
                out.append((kind, obj, outer))
    return out


def _path_edges(obj, outer: tuple[float, ...], page_top: float, out: list) -> None:
    """The path's straight horizontal and vertical segments, in points from the page top.

    As pdfplumber takes them from pdfminer: the drawn path's own coordinates (without
    the stroke's width), each straight piece and each closing piece; curves are left out.
    """
    a, b, c, d, e, f = _then(_matrix(obj), outer)
    x, y = ctypes.c_float(), ctypes.c_float()
    px, py = ctypes.byref(x), ctypes.byref(y)
    start = prev = None
    for i in range(raw.FPDFPath_CountSegments(obj)):
        seg = raw.FPDFPath_GetPathSegment(obj, i)
        if not raw.FPDFPathSegment_GetPoint(seg, px, py):
            continue
        pt = (a * x.value + c * y.value + e, page_top - (b * x.value + d * y.value + f))
        kind = raw.FPDFPathSegment_GetType(seg)
        if kind == raw.FPDF_SEGMENT_MOVETO:
            start = prev = pt
            continue
        if kind == raw.FPDF_SEGMENT_LINETO and prev is not None:
            _edge(prev, pt, out)
        if raw.FPDFPathSegment_GetClose(seg) and start is not None:
            _edge(pt, start, out)
            prev = start
        else:
            prev = pt


def _edge(p, q, out: list) -> None:
    (x0, y0), (x1, y1) = p, q
    if abs(y0 - y1) < 0.01 and x0 != x1:
        out.append(("h", min(x0, x1), y0, max(x0, x1), y0))
    elif abs(x0 - x1) < 0.01 and y0 != y1:
        out.append(("v", x0, min(y0, y1), x0, max(y0, y1)))


def _graphics(page_raw, width: float, height: float, facts: PageText, page_top: float) -> None:
    """Image coverage, whether the page's paths could draw a ruled table, and if so its edges."""
    left, bottom, right, top = (ctypes.c_float() for _ in range(4))
    refs = [ctypes.byref(v) for v in (left, bottom, right, top)]
    image_area = 0.0
    hs: set[int] = set()
    vs: set[int] = set()
    grid_like = False
    paths = []
    for kind, obj, outer in _page_objects(page_raw):
        if kind not in (PAGEOBJ_PATH, PAGEOBJ_IMAGE):
            continue
        if kind == PAGEOBJ_PATH:
            paths.append((obj, outer))
        if not raw.FPDFPageObj_GetBounds(obj, *refs):
            continue
        w = right.value - left.value
        h = top.value - bottom.value
        if kind == PAGEOBJ_IMAGE:
            facts.images += 1
            cw = max(0.0, min(right.value, width) - max(left.value, 0.0))
            ch = max(0.0, min(top.value, height) - max(bottom.value, 0.0))
            image_area += cw * ch
            continue
        if h <= 3.0 and w >= 8.0:  # bounds include the stroke width
            hs.add(round(bottom.value))
        elif w <= 3.0 and h >= 8.0:
            vs.add(round(left.value))
        elif w >= 8.0 and h >= 8.0:
            hs.update((round(bottom.value), round(top.value)))
            vs.update((round(left.value), round(right.value)))
            if raw.FPDFPath_CountSegments(obj) >= 10:
                grid_like = True
    area = width * height or 1.0
    facts.image_share = min(1.0, image_area / area)
    facts.ruled = grid_like or (len(hs) >= 3 and len(vs) >= 3)
    if facts.ruled:
        for obj, outer in paths:
            _path_edges(obj, outer, page_top, facts.edges)


def _chars_text(tp, n: int) -> str:
    """The page's characters, one per character index."""
    buf = (ctypes.c_ushort * (n + 1))()
    got = raw.FPDFText_GetText(tp, 0, n, buf)
    if got - 1 == n:
        text = bytes(memoryview(buf)[:n]).decode("utf-16-le", "replace")
        if len(text) == n:
            return text
    # Text and character indices differ (characters outside the BMP, say): ask each.
    out = []
    for i in range(n):
        code = raw.FPDFText_GetUnicode(tp, i)
        out.append(chr(code) if 0 <= code < 0x110000 else "\ufffd")
    return "".join(out)


def _own(name: str, argtypes: tuple, restype):
    """A PDFium function taking and returning plain integers (addresses, handles).

    pypdfium2's bindings want ctypes pointer objects and return them; plain integers
    let boxes land in one preallocated array and handles serve as dictionary keys,
    which halves the cost per character (0.67 against 1.18 us a box, measured on
    docbook-xsl-doc-pdf's reference.pdf). None when this build has no such handle.
    """
    try:
        import pypdfium2_raw.bindings as bindings

        fn = bindings._libs["pdfium"][name]
        fn.argtypes = argtypes
        fn.restype = restype
        return fn
    except Exception:  # another build of pypdfium2: the slower, public path
        return None


_VP = ctypes.c_void_p
_BOX = _own("FPDFText_GetLooseCharBox", (_VP, ctypes.c_int, _VP), ctypes.c_int)
_TEXT_OBJECT = _own("FPDFText_GetTextObject", (_VP, ctypes.c_int), _VP)
_OBJ_FONT = _own("FPDFTextObj_GetFont", (_VP,), _VP)


def _boxes(tp, indices: list[int]) -> np.ndarray:
    """(left, top, right, bottom) of each character index, as float32 rows."""
    m = len(indices)
    arr = (ctypes.c_float * (4 * m))()
    if _BOX is not None:
        handle = ctypes.cast(tp, ctypes.c_void_p).value
        base = ctypes.addressof(arr)
        box = _BOX
        for k, i in enumerate(indices):
            box(handle, i, base + 16 * k)
    else:
        rect = raw.FS_RECTF()
        pr = ctypes.byref(rect)
        for k, i in enumerate(indices):
            raw.FPDFText_GetLooseCharBox(tp, i, pr)
            arr[4 * k: 4 * k + 4] = [rect.left, rect.top, rect.right, rect.bottom]
    return np.frombuffer(arr, dtype=np.float32).reshape(m, 4).astype(np.float64)


def read_page(doc: pdfium.PdfDocument, index: int) -> PageText:
    """Words and page facts of page `index` (0-based). Hold LOCK while calling."""
    page = doc[index]
    try:
        width, height = page.get_size()
        mb_left, mb_bottom, mb_right, mb_top = page.get_mediabox()
        facts = PageText(width=float(width), height=float(height))
        page_raw = page.raw
        _graphics(page_raw, facts.width, facts.height, facts, float(mb_top))
        textpage = page.get_textpage()
        try:
            _words(textpage.raw, float(mb_top), facts)
        finally:
            textpage.close()
    finally:
        page.close()
    return facts


_SPACE_CODES = np.array(sorted(ord(c) for c in _SPACES), dtype=np.uint32)
_MARK_CODES = np.array(sorted(ord(c) for c in _HYPHEN_MARKS), dtype=np.uint32)
# Hyphen marks become "-"; other control characters are glyphs PDFium could not map.
_OUT = {ord(c): "-" for c in _HYPHEN_MARKS}
_OUT.update({c: "\ufffd" for c in range(0x20) if chr(c) not in _SPACES and chr(c) not in _HYPHEN_MARKS})


def _words(tp, page_top: float, facts: PageText) -> None:
    n = raw.FPDFText_CountChars(tp)
    if n <= 0:
        return
    text = _chars_text(tp, n)
    codes = np.frombuffer(text.encode("utf-32-le"), dtype=np.uint32)
    visible = np.flatnonzero(~np.isin(codes, _SPACE_CODES))
    m = len(visible)
    facts.visible_chars = m
    if not m:
        return
    idx = visible.tolist()
    box = _boxes(tp, idx)
    left, top, right, bottom = box[:, 0], box[:, 1], box[:, 2], box[:, 3]
    h = top - bottom
    h[h <= 0] = np.median(h[h > 0]) if np.any(h > 0) else 1.0
    vis_codes = codes[visible]
    vis_text = vis_codes.tobytes().decode("utf-32-le")
    marks = np.isin(vis_codes, _MARK_CODES)

    brk = np.ones(m, dtype=bool)
    if m > 1:
        size = np.maximum(h[1:], h[:-1]) / BOX_PER_SIZE
        brk[1:] = (
            (visible[1:] - visible[:-1] > 1)  # a space between them
            | (left[1:] - right[:-1] > WORD_GAP * size)
            | (left[1:] < left[:-1] - 0.25 * size)
            | (np.abs(bottom[1:] - bottom[:-1]) > 0.5 * np.minimum(h[1:], h[:-1]))
            | marks[:-1]
        )
    starts = np.flatnonzero(brk)
    ends = np.append(starts[1:], m)
    x0 = np.minimum.reduceat(left, starts).tolist()
    x1 = np.maximum.reduceat(right, starts).tolist()
    y0 = np.minimum.reduceat(bottom, starts).tolist()
    y1 = np.maximum.reduceat(top, starts).tolist()
    out_text = vis_text.translate(_OUT)
    hyph = marks[ends - 1].tolist()
    s_list = starts.tolist()
    e_list = ends.tolist()
    words = facts.words
    words.extend(
        Word(out_text[s:e], a, b, page_top - t, page_top - u, hyphen=hy, chars=e - s)
        for s, e, a, b, t, u, hy in zip(s_list, e_list, x0, x1, y1, y0, hyph)
    )

    # Fonts: one lookup per text object (a Tj/TJ run shares one font and size).
    matrix = raw.FS_MATRIX()
    pm = ctypes.byref(matrix)
    by_object: dict[int, tuple[float, bool, bool]] = {}
    by_font: dict[int, bool] = {}
    fast = _TEXT_OBJECT is not None and _OBJ_FONT is not None
    handle = ctypes.cast(tp, _VP).value
    for word, s in zip(words, s_list):
        i = idx[s]
        if fast:
            key = _TEXT_OBJECT(handle, i) or 0
        else:
            obj = raw.FPDFText_GetTextObject(tp, i)
            key = ctypes.cast(obj, _VP).value or 0
        found = by_object.get(key)
        if found is None:
            nominal = raw.FPDFText_GetFontSize(tp, i)
            raw.FPDFText_GetMatrix(tp, i, pm)
            scale = (matrix.c * matrix.c + matrix.d * matrix.d) ** 0.5 or 1.0
            upright = abs(matrix.b) <= 0.1 * abs(matrix.a) and matrix.a > 0
            bold = False
            if key:
                if fast:
                    fkey = _OBJ_FONT(key) or 0
                else:
                    fkey = ctypes.cast(raw.FPDFTextObj_GetFont(obj), _VP).value or 0
                if fkey not in by_font:
                    by_font[fkey] = _font_facts(ctypes.cast(fkey, raw.FPDF_FONT))[0] if fkey else False
                bold = by_font[fkey]
            found = (nominal * scale, bold, upright)
            by_object[key] = found
        word.size, word.bold, word.upright = found

    # Glyphs without a Unicode mapping: ask PDFium only about suspicious characters.
    odd = ((vis_codes < 0x20) & ~marks) | (vis_codes == 0xFFFD) | ((vis_codes >= 0xE000) & (vis_codes <= 0xF8FF))
    if odd.any():
        facts.unmapped = sum(1 for i in visible[odd].tolist() if raw.FPDFText_HasUnicodeMapError(tp, i))
