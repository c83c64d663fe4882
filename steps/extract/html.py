"""HTML pages; the whole file is one page. What is kept and dropped is html_walk's
(shared with the readers that meet HTML inside other formats)."""

from __future__ import annotations

from .blocks import PagePart, ReaderInput, ReadResult
from .html_walk import document_blocks, parse_html, title_text


def read_html(inp: ReaderInput) -> ReadResult:
    text, encoding = inp.text or "", inp.encoding
    root = parse_html(text)
    title = title_text(root)
    blocks = document_blocks(root)
    part = PagePart(page=None, blocks=blocks)
    if not blocks:
        part.warnings.append("no text (the page has no visible content)")
    return ReadResult(format="html", method="html", pages=[part], title=title,
                      encoding=encoding)
