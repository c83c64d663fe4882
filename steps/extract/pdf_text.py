"""A PDF page's text layer read through PDFium: words with their box, size and weight.

Why PDFium and not pdfminer for the characters: pdfminer (under pdfplumber) parses
every character in Python, 50-600 ms a page on the Debian documentation PDFs; PDFium's
text page is built in C++ and each character costs one ctypes call here (its box, about
0.6 us), so a page of 2 000 characters is read in a few milliseconds (bench/extract.py).
PDFium has no call that returns all boxes at once (FPDFText_CountRects/GetRect merge a
text object's characters into one rectangle, GetRectArray in its cpdf_textpage.cpp, which
loses the gaps the word rule needs).

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
from itertools import repeat
from types import SimpleNamespace
from dataclasses import dataclass, field
from functools import partial
from typing import NamedTuple

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


class Word(NamedTuple):
    """A word of the text layer. A tuple, so a page's words are made from zipped
    columns without a Python __init__ call each (about 400 words a page)."""

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


class WordColumns(NamedTuple):
    """A page's words as arrays, in the order of PageText.words: what line building
    needs, so it does not take the word tuples apart again (pdf_layout.make_lines)."""

    x0: np.ndarray
    x1: np.ndarray
    top: np.ndarray
    bottom: np.ndarray
    size: np.ndarray
    bold: np.ndarray
    chars: np.ndarray
    upright: np.ndarray
    blank: np.ndarray  # only whitespace (str.isspace) characters: no line takes it


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
    # The words again, as arrays (the PDFium route; not compared: `words` holds the same).
    columns: WordColumns | None = field(default=None, compare=False, repr=False)


def _font_facts(font) -> tuple[bool, str]:
    name = ctypes.create_string_buffer(256)
    n = raw.FPDFFont_GetBaseFontName(font, name, 256)
    base = name.value.decode("latin-1", "replace") if n else ""
    weight = raw.FPDFFont_GetWeight(font)
    flags = raw.FPDFFont_GetFlags(font)
    bold = bool(_BOLD.search(base.split("+", 1)[-1])) or weight >= 600 or bool(flags & _FORCE_BOLD)
    return bold, base


_IDENTITY = (1.0, 0.0, 0.0, 1.0, 0.0, 0.0)


def _matrix(obj: int) -> tuple[float, ...]:
    m = raw.FS_MATRIX()
    if not _OBJ_MATRIX(obj, ctypes.addressof(m)):
        return _IDENTITY
    return (m.a, m.b, m.c, m.d, m.e, m.f)


def _then(m: tuple[float, ...], outer: tuple[float, ...]) -> tuple[float, ...]:
    """The matrix applying m first, then outer (PDF's row-vector convention)."""
    a, b, c, d, e, f = m
    A, B, C, D, E, F = outer
    return (a * A + b * C, a * B + b * D, c * A + d * C, c * B + d * D, e * A + f * C + E, e * B + f * D + F)


def _page_objects(page: int) -> list[tuple[int, int, tuple[float, ...]]]:
    """(type, object, matrix of the forms around it) of every non-text page object."""
    stack = [(page, _COUNT_OBJECTS(page), _GET_OBJECT, _IDENTITY)]
    out = []
    while stack:
        parent, count, get, outer = stack.pop()
        if get is _GET_OBJECT and _BARE is not None:  # a page's objects: hundreds of them
            objects = list(map(_BARE.get_object, repeat(_Handle(parent), count), range(count)))
            kinds = map(_BARE.obj_type, objects)
        else:
            objects = list(map(get, repeat(parent, count), range(count)))
            kinds = map(_OBJ_TYPE, objects)
        for obj, kind in zip(objects, kinds):
            if kind == PAGEOBJ_FORM:
                stack.append((obj, _FORM_COUNT(obj), _FORM_OBJECT, _then(_matrix(obj), outer)))
            elif kind != PAGEOBJ_TEXT:
                out.append((kind, obj, outer))
    return out


def _path_edges(obj: int, outer: tuple[float, ...], page_top: float, out: list) -> None:
    """The path's straight horizontal and vertical segments, in points from the page top.

    As pdfplumber takes them from pdfminer: the drawn path's own coordinates (without
    the stroke's width), each straight piece and each closing piece; curves are left out.
    """
    a, b, c, d, e, f = _then(_matrix(obj), outer)
    count = _COUNT_SEGMENTS(obj)
    segments = list(map(_SEGMENT, repeat(obj, count), range(count)))
    points = np.empty((count, 2), dtype=np.float32)
    base = points.ctypes.data
    got = list(map(_SEG_POINT, segments, range(base, base + 8 * count, 8), range(base + 4, base + 8 * count, 8)))
    kinds = list(map(_SEG_TYPE, segments))
    closes = list(map(_SEG_CLOSE, segments))
    moveto, lineto = raw.FPDF_SEGMENT_MOVETO, raw.FPDF_SEGMENT_LINETO
    start = prev = None
    for (x, y), ok, kind, close in zip(points.tolist(), got, kinds, closes):
        if not ok:
            continue
        pt = (a * x + c * y + e, page_top - (b * x + d * y + f))
        if kind == moveto:
            start = prev = pt
            continue
        if kind == lineto and prev is not None:
            _edge(prev, pt, out)
        if close and start is not None:
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


def _graphics(page: int, width: float, height: float, facts: PageText, page_top: float) -> None:
    """Image coverage, whether the page's paths could draw a ruled table, and if so its edges."""
    box = (ctypes.c_float * 4)()
    at = ctypes.addressof(box)
    image_area = 0.0
    hs: set[int] = set()
    vs: set[int] = set()
    grid_like = False
    paths = []
    for kind, obj, outer in _page_objects(page):
        if kind not in (PAGEOBJ_PATH, PAGEOBJ_IMAGE):
            continue
        if kind == PAGEOBJ_PATH:
            paths.append((obj, outer))
        if not _OBJ_BOUNDS(obj, at, at + 4, at + 8, at + 12):
            continue
        left, bottom, right, top = box
        w = right - left
        h = top - bottom
        if kind == PAGEOBJ_IMAGE:
            facts.images += 1
            cw = max(0.0, min(right, width) - max(left, 0.0))
            ch = max(0.0, min(top, height) - max(bottom, 0.0))
            image_area += cw * ch
            continue
        if h <= 3.0 and w >= 8.0:  # bounds include the stroke width
            hs.add(round(bottom))
        elif w <= 3.0 and h >= 8.0:
            vs.add(round(left))
        elif w >= 8.0 and h >= 8.0:
            hs.update((round(bottom), round(top)))
            vs.update((round(left), round(right)))
            if _COUNT_SEGMENTS(obj) >= 10:
                grid_like = True
    area = width * height or 1.0
    facts.image_share = min(1.0, image_area / area)
    facts.ruled = grid_like or (len(hs) >= 3 and len(vs) >= 3)
    if facts.ruled:
        for obj, outer in paths:
            _path_edges(obj, outer, page_top, facts.edges)


def _chars_text(tp: int, n: int) -> str:
    """The page's characters, one per character index."""
    buf = np.zeros(n + 1, dtype=np.uint16)  # UTF-16 code units and a terminating zero
    got = _GET_TEXT(tp, 0, n, buf.ctypes.data)
    if got - 1 == n:
        text = buf[:n].tobytes().decode("utf-16-le", "replace")
        if len(text) == n:
            return text
    # Text and character indices differ (characters outside the BMP, say): ask each.
    out = []
    for i in range(n):
        code = _UNICODE(tp, i)
        out.append(chr(code) if 0 <= code < 0x110000 else "\ufffd")
    return "".join(out)


def _own(name: str, argtypes: tuple, restype):
    """A PDFium function taking and returning plain integers (addresses, handles).

    pypdfium2's bindings want ctypes pointer objects and return them; plain integers
    let boxes land in one preallocated array, let handles serve as dictionary keys and
    let map() drive many calls from C, which halves the cost per call (0.67 against
    1.18 us a box, measured on docbook-xsl-doc-pdf's reference.pdf). The function
    comes from pypdfium2's library handle; a build without that handle gets the
    public binding behind the same integer interface (`_adapted`, slower).
    """
    try:
        import pypdfium2_raw.bindings as bindings

        fn = bindings._libs["pdfium"][name]  # a new function object: pypdfium2's own is untouched
    except Exception:
        return _adapted(getattr(raw, name), argtypes, restype)
    fn.argtypes = argtypes
    fn.restype = restype
    return fn


def _adapted(public, argtypes: tuple, restype):
    """`public` (a pypdfium2 binding) called with and returning plain integers."""
    types = public.argtypes

    def call(*args):
        res = public(*(ctypes.cast(_VP(a), t) if at is _VP else a for a, at, t in zip(args, argtypes, types)))
        return ctypes.cast(res, _VP).value if restype is _VP else res

    return call


_VP = ctypes.c_void_p
_INT = ctypes.c_int
_new_word = partial(tuple.__new__, Word)  # a Word from a tuple of all its fields, in order
_BOX = _own("FPDFText_GetLooseCharBox", (_VP, _INT, _VP), _INT)
_TEXT_OBJECT = _own("FPDFText_GetTextObject", (_VP, _INT), _VP)
_OBJ_FONT = _own("FPDFTextObj_GetFont", (_VP,), _VP)
_LOAD_PAGE = _own("FPDF_LoadPage", (_VP, _INT), _VP)
_CLOSE_PAGE = _own("FPDF_ClosePage", (_VP,), None)
_LOAD_TEXT = _own("FPDFText_LoadPage", (_VP,), _VP)
_CLOSE_TEXT = _own("FPDFText_ClosePage", (_VP,), None)
_WIDTH = _own("FPDF_GetPageWidthF", (_VP,), ctypes.c_float)
_HEIGHT = _own("FPDF_GetPageHeightF", (_VP,), ctypes.c_float)
_MEDIABOX = _own("FPDFPage_GetMediaBox", (_VP, _VP, _VP, _VP, _VP), _INT)
_COUNT_OBJECTS = _own("FPDFPage_CountObjects", (_VP,), _INT)
_GET_OBJECT = _own("FPDFPage_GetObject", (_VP, _INT), _VP)
_FORM_COUNT = _own("FPDFFormObj_CountObjects", (_VP,), _INT)
_FORM_OBJECT = _own("FPDFFormObj_GetObject", (_VP, ctypes.c_ulong), _VP)
_OBJ_TYPE = _own("FPDFPageObj_GetType", (_VP,), _INT)
_OBJ_BOUNDS = _own("FPDFPageObj_GetBounds", (_VP, _VP, _VP, _VP, _VP), _INT)
_OBJ_MATRIX = _own("FPDFPageObj_GetMatrix", (_VP, _VP), _INT)
_COUNT_SEGMENTS = _own("FPDFPath_CountSegments", (_VP,), _INT)
_SEGMENT = _own("FPDFPath_GetPathSegment", (_VP, _INT), _VP)
_SEG_POINT = _own("FPDFPathSegment_GetPoint", (_VP, _VP, _VP), _INT)
_SEG_TYPE = _own("FPDFPathSegment_GetType", (_VP,), _INT)
_SEG_CLOSE = _own("FPDFPathSegment_GetClose", (_VP,), _INT)
_COUNT_CHARS = _own("FPDFText_CountChars", (_VP,), _INT)
_GET_TEXT = _own("FPDFText_GetText", (_VP, _INT, _INT, _VP), _INT)
_UNICODE = _own("FPDFText_GetUnicode", (_VP, _INT), ctypes.c_uint)
_FONT_SIZE = _own("FPDFText_GetFontSize", (_VP, _INT), ctypes.c_double)
_CHAR_MATRIX = _own("FPDFText_GetMatrix", (_VP, _INT, _VP), _INT)
_MAP_ERROR = _own("FPDFText_HasUnicodeMapError", (_VP, _INT), _INT)


class _Handle(ctypes.c_void_p):
    """A PDFium handle that ctypes hands back as it is (a subclass of c_void_p is not
    turned into an int), so it goes into the next bare call without a conversion."""


def _bare_functions() -> SimpleNamespace | None:
    """The hottest PDFium calls without ctypes' argument conversion: 0.36 against 0.62
    us a call for a character's box (/usr/share/doc/libtasn1-doc's manual, 22,000 calls
    each way). With `argtypes` set, ctypes converts every argument on every call;
    without them, a pointer object is passed as it is and a small int as a C int, so
    handles are wrapped once (`_Handle`) and box slots made once (`_BoxSlots`). A C int
    cannot carry an address: only indices go in as ints. None without pypdfium2's
    library handle (then `_own`'s route, or the public bindings, serve)."""
    try:
        import pypdfium2_raw.bindings as bindings

        lib = bindings._libs["pdfium"]
    except Exception:
        return None
    out = SimpleNamespace()
    for attr, name, restype in (
        ("box", "FPDFText_GetLooseCharBox", _INT),
        ("text_object", "FPDFText_GetTextObject", _VP),
        ("get_object", "FPDFPage_GetObject", _Handle),
        ("obj_type", "FPDFPageObj_GetType", _INT),
    ):
        fn = lib[name]  # a new function object each time: pypdfium2's own is untouched
        fn.argtypes = None
        fn.restype = restype
        setattr(out, attr, fn)
    return out


_BARE = _bare_functions()


class _BoxSlots:
    """Where the characters' boxes land: `ptrs` point into `buf`, made once per process
    and grown when a page has more characters. Used under LOCK only (one page at a
    time), so the slots are never shared."""

    def __init__(self) -> None:
        self.buf = np.empty((0, 4), dtype=np.float32)
        self.ptrs: list[ctypes.c_void_p] = []

    def read(self, box, tp: int, indices: list[int]) -> np.ndarray:
        m = len(indices)
        if m > len(self.ptrs):
            size = max(m, 2 * len(self.ptrs), 4096)
            self.buf = np.empty((size, 4), dtype=np.float32)
            base = self.buf.ctypes.data
            self.ptrs = list(map(_VP, range(base, base + 16 * size, 16)))
        # map() stops at the shortest input: the m indices.
        for _ in map(box, repeat(_VP(tp), m), indices, self.ptrs):
            pass
        return self.buf[:m].astype(np.float64)


_BOX_SLOTS = _BoxSlots()


def _boxes(tp: int, indices: list[int]) -> np.ndarray:
    """(left, top, right, bottom) of each character index, as float64 rows."""
    if _BARE is not None:
        return _BOX_SLOTS.read(_BARE.box, tp, indices)
    m = len(indices)
    arr = np.empty((m, 4), dtype=np.float32)
    base = arr.ctypes.data
    # map() drives the calls from C: no Python loop step per character.
    for _ in map(_BOX, repeat(tp, m), indices, range(base, base + 16 * m, 16)):
        pass
    return arr.astype(np.float64)


def read_page(doc: pdfium.PdfDocument, index: int) -> PageText:
    """Words and page facts of page `index` (0-based). Hold LOCK while calling.

    The page and its text page are opened and closed through PDFium directly, with
    pypdfium2's messages when that fails: its page objects register finalizers and
    parent links, a measurable share of a page's time for two handles used once.
    """
    page = _LOAD_PAGE(ctypes.cast(doc.raw, _VP).value, index)
    if not page:
        raise pdfium.PdfiumError("Failed to load page.")
    try:
        box = (ctypes.c_float * 4)()
        at = ctypes.addressof(box)
        if _MEDIABOX(page, at, at + 4, at + 8, at + 12):
            mb_top = float(box[3])
        else:  # no MediaBox of its own: pypdfium2's fallback, US Letter
            mb_top = 792.0
        facts = PageText(width=float(_WIDTH(page)), height=float(_HEIGHT(page)))
        _graphics(page, facts.width, facts.height, facts, mb_top)
        textpage = _LOAD_TEXT(page)
        if not textpage:
            raise pdfium.PdfiumError("Failed to load text page.")
        try:
            _words(textpage, mb_top, facts)
        finally:
            _CLOSE_TEXT(textpage)
    finally:
        _CLOSE_PAGE(page)
    return facts




def _table(chars: set[str]) -> np.ndarray:
    """A lookup table for `chars`: table[min(code, len - 1)] is True for a member.
    (np.isin sorts both arrays on every call; a page asks twice.)"""
    table = np.zeros(max(ord(c) for c in chars) + 2, dtype=bool)
    table[[ord(c) for c in chars]] = True
    return table


_SPACE_TABLE = _table(_SPACES)
_MARK_TABLE = _table(_HYPHEN_MARKS)
# What str.isspace (so str.strip) counts as white space; none lies above U+3000.
_WHITE_TABLE = _table({chr(c) for c in range(0x3001) if chr(c).isspace()})


def _words(tp: int, page_top: float, facts: PageText) -> None:
    n = _COUNT_CHARS(tp)
    if n <= 0:
        return
    text = _chars_text(tp, n)
    codes = np.frombuffer(text.encode("utf-32-le"), dtype=np.uint32)
    visible = np.flatnonzero(~_SPACE_TABLE[np.minimum(codes, len(_SPACE_TABLE) - 1)])
    m = len(visible)
    facts.visible_chars = m
    if not m:
        return
    idx = visible.tolist()
    box = _boxes(tp, idx)
    left, top, right, bottom = box[:, 0], box[:, 1], box[:, 2], box[:, 3]
    h = top - bottom
    flat = h <= 0
    if flat.any():  # boxes without height take the page's usual height
        h[flat] = np.median(h[h > 0]) if np.any(h > 0) else 1.0
    vis_codes = codes[visible]
    marks = _MARK_TABLE[np.minimum(vis_codes, len(_MARK_TABLE) - 1)]
    controls = vis_codes < 0x20
    if marks.any() or controls.any():
        # Hyphen marks become "-", other control characters (glyphs PDFium could not
        # map) U+FFFD: replaced in the codes, before the one decoding of the page.
        out_codes = vis_codes.copy()
        out_codes[controls] = 0xFFFD
        out_codes[marks] = 0x2D
        out_text = out_codes.tobytes().decode("utf-32-le")
    else:
        out_codes = vis_codes
        out_text = vis_codes.tobytes().decode("utf-32-le")

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
    x0_ = np.minimum.reduceat(left, starts)
    x1_ = np.maximum.reduceat(right, starts)
    y0_ = np.minimum.reduceat(bottom, starts)
    y1_ = np.maximum.reduceat(top, starts)
    hyph = marks[ends - 1].tolist()
    s_list = starts.tolist()
    e_list = ends.tolist()

    # Fonts: one lookup per text object (a Tj/TJ run shares one font and size). The
    # object of each word's first character is asked in one map() (no Python loop per
    # word), the facts once per distinct object.
    first = visible[starts].tolist()
    if _BARE is not None:
        keys = [k or 0 for k in map(_BARE.text_object, repeat(_VP(tp), len(first)), first)]
    else:
        keys = [k or 0 for k in map(_TEXT_OBJECT, repeat(tp, len(first)), first)]
    by_object: dict[int, tuple[float, bool, bool]] = {}
    by_font: dict[int, bool] = {}
    matrix = raw.FS_MATRIX()
    pm = ctypes.addressof(matrix)
    for key, i in zip(keys, first):
        if key in by_object:
            continue
        nominal = _FONT_SIZE(tp, i)
        _CHAR_MATRIX(tp, i, pm)
        scale = (matrix.c * matrix.c + matrix.d * matrix.d) ** 0.5 or 1.0
        upright = abs(matrix.b) <= 0.1 * abs(matrix.a) and matrix.a > 0
        bold = False
        if key:
            fkey = _OBJ_FONT(key) or 0
            if fkey not in by_font:
                by_font[fkey] = _font_facts(ctypes.cast(fkey, raw.FPDF_FONT))[0] if fkey else False
            bold = by_font[fkey]
        by_object[key] = (nominal * scale, bold, upright)
    fonts = [by_object[k] for k in keys]
    sizes, bolds, uprights = [f[0] for f in fonts], [f[1] for f in fonts], [f[2] for f in fonts]
    tops, bottoms, chars = page_top - y1_, page_top - y0_, ends - starts
    facts.words.extend(map(_new_word, zip(
        [out_text[s:e] for s, e in zip(s_list, e_list)], x0_.tolist(), x1_.tolist(),
        tops.tolist(), bottoms.tolist(), sizes, bolds, hyph, chars.tolist(), uprights)))
    white = _WHITE_TABLE[np.minimum(out_codes, len(_WHITE_TABLE) - 1)]
    facts.columns = WordColumns(x0_, x1_, tops, bottoms, np.array(sizes), np.array(bolds, dtype=bool), chars,
                                np.array(uprights, dtype=bool), np.logical_and.reduceat(white, starts))

    # Glyphs without a Unicode mapping: ask PDFium only about suspicious characters.
    odd = (controls & ~marks) | (vis_codes == 0xFFFD) | ((vis_codes >= 0xE000) & (vis_codes <= 0xF8FF))
    if odd.any():
        facts.unmapped = sum(1 for i in visible[odd].tolist() if _MAP_ERROR(tp, i))
