"""HTML pages; the whole file is one page. What is kept and dropped is html_walk's
(shared with the readers that meet HTML inside other formats)."""

from __future__ import annotations

from .blocks import PagePart, ReaderInput, ReadResult, inline
from .html_walk import Walker, parse_html


def read_html(inp: ReaderInput) -> ReadResult:
    text, encoding = inp.text or "", inp.encoding
    soup = parse_html(text)
    title_tag = soup.find("title")
    title = inline(title_tag.get_text()) if title_tag else ""
    walker = Walker()
    walker.walk(soup)
    walker.flush()
    part = PagePart(page=None, blocks=walker.blocks)
    if not walker.blocks:
        part.warnings.append("no text (the page has no visible content)")
    return ReadResult(format="html", method="html", pages=[part], title=title,
                      encoding=encoding)
