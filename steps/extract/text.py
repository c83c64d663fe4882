"""Plain text: paragraphs split at blank lines; the whole file is one page.

The text arrives decoded (see sniff.decode) with line endings normalised. Lines inside
a paragraph keep their breaks (plain text often carries structure in them: addresses,
lists, hard-wrapped notes). A form feed counts as a blank line.

One heading rule, because it is how plain-text files have marked titles for decades
(common practice): a two-line paragraph whose second line is only "=" or "-" (three
or more) is a heading of level 1 ("=") or 2 ("-").
"""

from __future__ import annotations

import re

from .blocks import PagePart, ReaderInput, ReadResult, heading_block, paragraph_block

_BLANK = re.compile(r"\n[^\S\n]*(?:\n[^\S\n]*)+")
_UNDERLINE = re.compile(r"^(=+|-+)[^\S\n]*$")


def text_blocks(text: str) -> list:
    blocks = []
    text = text.replace("\f", "\n\n")
    for chunk in _BLANK.split(text):
        lines = [line for line in chunk.split("\n") if line.strip()]
        if not lines:
            continue
        if len(lines) == 2 and len(lines[1].strip()) >= 3 and _UNDERLINE.match(lines[1].strip()):
            level = 1 if lines[1].strip().startswith("=") else 2
            block = heading_block(lines[0], level)
        else:
            block = paragraph_block("\n".join(lines), keep_spacing=True)
        if block:
            blocks.append(block)
    return blocks


def read_text(inp: ReaderInput) -> ReadResult:
    text, encoding = inp.text or "", inp.encoding
    blocks = text_blocks(text)
    part = PagePart(page=None, blocks=blocks)
    if not blocks:
        part.warnings.append("no text (the file holds only whitespace)")
    return ReadResult(format="text", method="plain", pages=[part], encoding=encoding)
