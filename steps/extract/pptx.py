"""PowerPoint decks (.pptx), read with python-pptx; one page per slide.

Page = the slide's number in the deck (hidden slides counted, so numbers match the
program's). The title placeholder (title or centred title) is the level-1 heading;
other shapes follow in reading order (slides_order.py): text frames paragraph by
paragraph (a list item when it sets a bullet or number itself; when it inherits
one, when it has an outline level above 0 or is one of several paragraphs of a body
placeholder), tables as tables, group members
inside their group. Pictures, charts and media hold no text we read. Speaker notes
come last under "Notes" unless `slide_notes` is off. Hidden slides (show="0") are
left out and listed in the first page's `removed`.
"""

from __future__ import annotations

import io

from .blocks import DocumentFailure, PagePart, ReaderInput, ReadResult, inline
from .slides_order import Shape, slide_blocks

_TITLE_TYPES = {"TITLE", "CENTER_TITLE", "VERTICAL_TITLE"}
_BODY_TYPES = {"BODY", "OBJECT", "VERTICAL_BODY", "VERTICAL_OBJECT"}


def _placeholder_type(shape) -> str:
    if not getattr(shape, "is_placeholder", False):
        return ""
    try:
        return shape.placeholder_format.type.name or ""
    except Exception:  # a placeholder without a type attribute, or an unknown one
        return "BODY" if shape.is_placeholder else ""


def _bullet(paragraph) -> bool | None:
    """True/False when the paragraph itself sets a bullet or number (a:buChar,
    a:buAutoNum) or none (a:buNone); None when it inherits (ECMA-376 21.1.2.4)."""
    ppr = paragraph._p.pPr
    if ppr is None:
        return None
    for child in ppr:
        local = child.tag.rsplit("}", 1)[-1]
        if local in ("buChar", "buAutoNum", "buBlip"):
            return True
        if local == "buNone":
            return False
    return None


def _position(shape) -> tuple[float, float]:
    try:
        return float(shape.top or 0), float(shape.left or 0)
    except Exception:  # a placeholder whose layout lost its position
        return 0.0, 0.0


def _shape(shape) -> Shape | None:
    top, left = _position(shape)
    if shape.shape_type is not None and shape.shape_type.name == "GROUP":
        members = [s for s in (_shape(m) for m in shape.shapes) if s is not None]
        return Shape(top, left, members=members) if members else None
    if getattr(shape, "has_table", False) and shape.has_table:
        rows = []
        for row in shape.table.rows:
            rows.append(["" if cell.is_spanned else inline(cell.text) for cell in row.cells])
        return Shape(top, left, table=rows)
    if not getattr(shape, "has_text_frame", False) or not shape.has_text_frame:
        return None
    kind = _placeholder_type(shape)
    paragraphs = [p for p in shape.text_frame.paragraphs if p.text.strip()]
    bulleted = kind in _BODY_TYPES and len(paragraphs) > 1
    out = []
    for p in paragraphs:
        bullet = _bullet(p)
        is_item = bullet if bullet is not None else bool(p.level or bulleted)
        out.append((p.text.replace("\x0b", " "), p.level if is_item else None))
    if not out:
        return None
    return Shape(top, left, title=kind in _TITLE_TYPES, paragraphs=out)


def read_pptx(inp: ReaderInput) -> ReadResult:
    import pptx

    try:
        deck = pptx.Presentation(io.BytesIO(inp.data))
        slides = list(deck.slides)
    except Exception as exc:  # python-pptx raises several kinds for damaged packages
        raise DocumentFailure(f"unreadable PPTX: {type(exc).__name__}: {exc}", exc) from exc
    if len(slides) > inp.params.max_pages:
        raise DocumentFailure(f"too many slides: {len(slides)} over the limit of "
                              f"{inp.params.max_pages} (max_pages)")
    pages: list[PagePart] = []
    removed: list[dict] = []
    for number, slide in enumerate(slides, start=1):
        if slide._element.get("show") in ("0", "false"):
            removed.append({"kind": "slide", "text": str(number), "reason": "the slide is hidden"})
            continue
        try:
            shapes = [s for s in (_shape(sh) for sh in slide.shapes) if s is not None]
            notes = None
            if inp.params.slide_notes and slide.has_notes_slide:
                frame = slide.notes_slide.notes_text_frame
                if frame is not None:
                    notes = [p.text for p in frame.paragraphs]
            blocks = slide_blocks(shapes, notes)
        except Exception as exc:  # one damaged slide fails its page only
            pages.append(PagePart(page=number, failure=f"unreadable slide {number}: "
                                  f"{type(exc).__name__}: {exc}", error=exc))
            continue
        part = PagePart(page=number, blocks=blocks)
        if not blocks:
            part.warnings.append("no text on the slide")
        pages.append(part)
    if not pages:
        raise DocumentFailure("no visible slide" if removed else "the deck has no slides")
    pages[0].removed.extend(removed)
    title = ""
    try:
        title = (deck.core_properties.title or "").strip()
    except Exception:  # a damaged core.xml only costs the title
        title = ""
    warnings = [f"{len(removed)} hidden slide(s) left out"] if removed else []
    return ReadResult(format="pptx", method="pptx", pages=pages, title=title,
                      page_count=len(slides), warnings=warnings)
