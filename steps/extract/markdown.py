"""Markdown, parsed with markdown-it-py (CommonMark plus GFM tables); one page per file.

- ATX and Setext headings keep their level (h1..h6).
- Paragraphs and block quotes become paragraphs; inline markup is dropped (emphasis
  markers, link targets) and soft line breaks become spaces, as a renderer shows them.
- A list (with its nested lists) becomes one paragraph of item lines: "- item" for
  bullets, "3. item" for ordered items, two spaces of indent per nesting level.
- Fenced and indented code become CODE blocks with their lines intact.
- Tables become TABLE blocks, header row first.
- Raw HTML blocks contribute their text; YAML front matter at the top (between "---"
  lines) is not content, but its `title:` is the document title.
"""

from __future__ import annotations

import re
from functools import lru_cache
from types import SimpleNamespace

from markdown_it import MarkdownIt
from markdown_it import helpers as markdown_helpers
from markdown_it.common.utils import unescapeAll
from markdown_it.token import Token

from .blocks import (
    ReaderInput,
    PagePart,
    ReadResult,
    code_block,
    heading_block,
    inline,
    flush_list,
    paragraph_block,
    table_block,
)
from .html_walk import visible_text

_FRONT_MATTER = re.compile(r"\A---[^\S\n]*\n(.*?\n)(?:---|\.\.\.)[^\S\n]*(?:\n|\Z)", re.DOTALL)
_FRONT_KEY = re.compile(r"^[A-Za-z_][\w-]*\s*:")
_FRONT_TITLE = re.compile(r"^title\s*:\s*(.+?)\s*$", re.MULTILINE | re.IGNORECASE)


# The characters markdown-it's inline rules act on in the "commonmark" preset (escape,
# backticks, emphasis, link, image, autolink, HTML, entity); line breaks only become
# spaces, which the blocks' whitespace collapse (blocks.inline) does anyway.
_INLINE_MARKUP = re.compile(r"[\\`*_\[\]!<&]")
# An inline token with none of them: its content is its text, unparsed.
PLAIN_INLINE = "inline_plain"
_INLINE_KINDS = ("inline", PLAIN_INLINE)


def _mark_plain(state) -> None:
    """A core rule run before markdown-it's "inline": inline parsing of content with no
    markup character gives back the content itself (one text token, line breaks as soft
    breaks), so such tokens are renamed and not parsed."""
    for token in state.tokens:
        if token.type == "inline" and not _INLINE_MARKUP.search(token.content):
            token.type = PLAIN_INLINE


# In a link target written without angle brackets, the characters markdown-it's
# parseLinkDestination acts on: a space or a control character ends the target, a
# backslash escapes the next character, brackets nest.
_TARGET_STOP = re.compile(r"[\x00-\x20\x7f\\()]")


class _Target:
    __slots__ = ("ok", "pos", "str")

    def __init__(self, ok: bool = False, pos: int = 0, text: str = "") -> None:
        self.ok, self.pos, self.str = ok, pos, text


def link_destination(string: str, pos: int, maximum: int):
    """markdown-it-py's parseLinkDestination (helpers/parse_link_destination.py) with
    the same result, taking each run of ordinary characters in one search instead of a
    Python step per character: it was 16 % of the parse on the Debian documentation
    drive's changelogs, whose links are many. Targets in angle brackets go to
    markdown-it's own (tests/test_extract_markdown.py compares the two)."""
    if string.startswith("<", pos):
        return markdown_helpers.parseLinkDestination(string, pos, maximum)
    start, level, end = pos, 0, min(maximum, len(string))
    while True:
        found = _TARGET_STOP.search(string, pos, end)
        if found is None:
            pos = end
            break
        pos = found.start()
        char = string[pos]
        if char == "\\":
            if pos + 1 < maximum:
                if string[pos + 1] == " ":
                    break
                pos += 2
            else:
                pos += 1
        elif char == "(":
            level += 1
            if level > 32:
                return _Target()
            pos += 1
        elif char == ")":
            if level == 0:
                break
            level -= 1
            pos += 1
        else:  # a space or a control character
            break
    if start == pos or level != 0:
        return _Target()
    return _Target(True, pos, unescapeAll(string[start:pos]))


@lru_cache(maxsize=1)
def _parser() -> MarkdownIt:
    """Made once per process: parse keeps its state per call, not in the parser."""
    md = MarkdownIt("commonmark").enable("table")
    md.core.ruler.before("inline", "plain_inline", _mark_plain)
    # A link's target is dropped (only its text is kept), so it need not be normalised:
    # percent-encoding every target was 18 % of the parse on the Debian documentation
    # drive's 195 Markdown files (14 MB, mostly changelogs full of links). Whether a
    # target is allowed at all (validateLink) is still checked, on the target as written.
    md.normalizeLink = lambda url: url
    md.helpers = SimpleNamespace(parseLinkLabel=markdown_helpers.parseLinkLabel,
                                 parseLinkDestination=link_destination,
                                 parseLinkTitle=markdown_helpers.parseLinkTitle)
    return md


def split_front_matter(text: str) -> tuple[str, str]:
    """(title from front matter or "", the text without it)."""
    found = _FRONT_MATTER.match(text)
    if not found:
        return "", text
    body = found.group(1)
    first = next((line for line in body.split("\n") if line.strip()), "")
    if not _FRONT_KEY.match(first):
        return "", text  # a thematic break followed by text, not front matter
    title = ""
    match = _FRONT_TITLE.search(body)
    if match:
        title = match.group(1).strip().strip("\"'")
    # Keep the line count so nothing else shifts; the lines are blank now.
    return title, "\n" * found.group(0).count("\n") + text[found.end():]


def _inline_text(token: Token) -> str:
    if token.type == PLAIN_INLINE:
        return token.content
    out: list[str] = []
    for child in token.children or []:
        if child.type in ("text", "code_inline"):
            out.append(child.content)
        elif child.type in ("softbreak", "hardbreak"):
            out.append(" ")
        elif child.type == "image":
            out.append(_inline_text(child) or child.attrs.get("alt", "") or "")
        elif child.type == "html_inline":
            continue
    return "".join(out)


def markdown_blocks(text: str) -> list:
    tokens = _parser().parse(text)
    blocks = []
    list_lines: list[str] = []
    # One entry per open list: [ordered, next number]
    lists: list[list] = []
    item_open: list[bool] = []  # per open list item: has its first line been written
    i = 0

    def end_list() -> None:
        flush_list(blocks, list_lines)

    def add_text(value: str) -> None:
        value = inline(value)
        if not value:
            return
        if lists:
            depth = len(lists) - 1
            if item_open and not item_open[-1]:
                ordered, number = lists[-1]
                marker = f"{number}." if ordered else "-"
                list_lines.append("  " * depth + f"{marker} {value}")
                item_open[-1] = True
            elif list_lines:
                list_lines[-1] += " " + value
            else:
                list_lines.append("  " * depth + value)
        else:
            block = paragraph_block(value)
            if block:
                blocks.append(block)

    while i < len(tokens):
        tok = tokens[i]
        kind = tok.type
        if kind == "heading_open":
            end_list()
            block = heading_block(_inline_text(tokens[i + 1]), int(tok.tag[1:]))
            if block:
                blocks.append(block)
            i += 3
            continue
        if kind in ("bullet_list_open", "ordered_list_open"):
            start = tok.attrs.get("start", 1) if kind == "ordered_list_open" else 1
            lists.append([kind == "ordered_list_open", int(start or 1)])
        elif kind in ("bullet_list_close", "ordered_list_close"):
            lists.pop()
            if not lists:
                end_list()
        elif kind == "list_item_open":
            item_open.append(False)
            if lists and lists[-1][0] and tok.info:
                lists[-1][1] = int(tok.info)
        elif kind == "list_item_close":
            item_open.pop()
            if lists and lists[-1][0]:
                lists[-1][1] += 1
        elif kind in _INLINE_KINDS:
            add_text(_inline_text(tok))
        elif kind in ("fence", "code_block"):
            end_list()
            block = code_block(tok.content)
            if block:
                blocks.append(block)
        elif kind == "table_open":
            end_list()
            rows: list[list[str]] = []
            i += 1
            while i < len(tokens) and tokens[i].type != "table_close":
                t = tokens[i]
                if t.type == "tr_open":
                    rows.append([])
                elif t.type in _INLINE_KINDS and rows:
                    rows[-1].append(_inline_text(t))
                i += 1
            block = table_block(rows)
            if block:
                blocks.append(block)
        elif kind == "html_block":
            add_text(visible_text(tok.content))
        i += 1
    end_list()
    return blocks


def read_markdown(inp: ReaderInput) -> ReadResult:
    text, encoding = inp.text or "", inp.encoding
    title, body = split_front_matter(text)
    blocks = markdown_blocks(body)
    part = PagePart(page=None, blocks=blocks)
    if not blocks:
        part.warnings.append("no text (the file holds no Markdown content)")
    return ReadResult(
        format="markdown", method="markdown", pages=[part], title=title, encoding=encoding
    )
