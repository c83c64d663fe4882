"""OpenDocument presentations (.odp, .otp), read from content.xml; one page per slide.

The same page rules as .pptx (slides_order.py): the frame of presentation class
"title" is the heading; other frames, shapes and groups (draw:g) in reading order by
their svg:x/svg:y; text boxes as paragraphs and lists; tables as tables; the notes
page's text (presentation:notes) last under "Notes" unless `slide_notes` is off. A
slide whose drawing-page style says presentation:visibility="hidden" is left out and
listed in the first page's `removed`.
"""

from __future__ import annotations

from .blocks import DocumentFailure, PagePart, ReaderInput, ReadResult
from .odf_text import (
    LIST,
    NS,
    P,
    H,
    TABLE,
    Package,
    length_cm,
    list_lines,
    paragraph_text,
    q,
    table_rows,
)
from .slides_order import Shape, slide_blocks

PAGE, FRAME, GROUP, NOTES = q("draw:page"), q("draw:frame"), q("draw:g"), q("presentation:notes")
TEXT_BOX = q("draw:text-box")
_CLASS = q("presentation:class")
_TITLE_CLASSES = {"title"}
_DRAWN = {q("draw:custom-shape"), q("draw:rect"), q("draw:ellipse"), q("draw:polygon"),
          q("draw:path"), q("draw:line"), q("draw:connector"), q("draw:circle")}


def _hidden_styles(root) -> set[str]:
    hidden = set()
    for style in root.iterfind(".//style:style[@style:family='drawing-page']", NS):
        props = style.find("style:drawing-page-properties", NS)
        if props is not None and props.get(q("presentation:visibility")) == "hidden":
            hidden.add(style.get(q("style:name")))
    return hidden


def _text_of(container) -> list[tuple[str, int | None]]:
    """Paragraphs (text, list level or None) of a text box or a drawn shape."""
    out: list[tuple[str, int | None]] = []
    for child in container:
        if child.tag in (P, H):
            out.append((paragraph_text(child), None))
        elif child.tag == LIST:
            for line in list_lines(child):
                stripped = line.lstrip(" ")
                depth = (len(line) - len(stripped)) // 2
                out.append((stripped[2:], depth))
    return out


def _shape(element) -> Shape | None:
    top, left = length_cm(element.get(q("svg:y"))), length_cm(element.get(q("svg:x")))
    if element.tag == GROUP:
        members = [s for s in (_shape(c) for c in element) if s is not None]
        if not members:
            return None
        return Shape(min(m.top for m in members), min(m.left for m in members), members=members)
    if element.tag == FRAME:
        table = element.find(TABLE)
        if table is not None:
            return Shape(top, left, table=table_rows(table))
        box = element.find(TEXT_BOX)
        if box is None:
            return None  # an image, a chart or an embedded object
        paragraphs = _text_of(box)
        cls = element.get(_CLASS, "")
        if cls == "outline":  # the body placeholder: its paragraphs are bullet points
            paragraphs = [(t, 0 if lvl is None else lvl) for t, lvl in paragraphs]
        if not any(t.strip() for t, _ in paragraphs):
            return None
        return Shape(top, left, title=cls in _TITLE_CLASSES, paragraphs=paragraphs)
    if element.tag in _DRAWN:
        paragraphs = _text_of(element)
        return Shape(top, left, paragraphs=paragraphs) if any(t.strip() for t, _ in paragraphs) else None
    return None


def read_odp(inp: ReaderInput) -> ReadResult:
    package = Package(inp.data, "OpenDocument presentation")
    slides = list(package.root.iter(PAGE))
    if len(slides) > inp.params.max_pages:
        raise DocumentFailure(f"too many slides: {len(slides)} over the limit of "
                              f"{inp.params.max_pages} (max_pages)")
    hidden = _hidden_styles(package.root)
    pages: list[PagePart] = []
    removed: list[dict] = []
    for number, slide in enumerate(slides, start=1):
        if slide.get(q("draw:style-name")) in hidden:
            removed.append({"kind": "slide", "text": str(number), "reason": "the slide is hidden"})
            continue
        shapes = [s for s in (_shape(c) for c in slide) if s is not None]
        notes = None
        if inp.params.slide_notes:
            page_notes = slide.find(NOTES)
            if page_notes is not None:
                notes = []
                for frame in page_notes.iter(FRAME):
                    if frame.get(_CLASS) == "notes":
                        box = frame.find(TEXT_BOX)
                        if box is not None:
                            notes.extend(t for t, _ in _text_of(box))
        blocks = slide_blocks(shapes, notes)
        part = PagePart(page=number, blocks=blocks)
        if not blocks:
            part.warnings.append("no text on the slide")
        pages.append(part)
    if not pages:
        raise DocumentFailure("no visible slide" if removed else "the presentation has no slides")
    pages[0].removed.extend(removed)
    warnings = [f"{len(removed)} hidden slide(s) left out"] if removed else []
    return ReadResult(format="odp", method="odp", pages=pages, title=package.title,
                      page_count=len(slides), warnings=warnings)
