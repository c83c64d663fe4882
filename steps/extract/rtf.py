"""RTF documents, read with a small tokenizer written here (RTF 1.9.1 specification);
the whole file is one page.

Why our own: the RTF readers on PyPI either strip RTF to plain text (no paragraphs'
roles, no tables) or are unmaintained; the part of RTF a text reader needs is small.

- Text: plain characters, \\'hh bytes decoded with the code page of the current font
  (\\fcharset in the font table) or of the document (\\ansicpg; Windows-1252 when it
  names none), \\uN Unicode characters (their \\ucN fallback characters skipped).
- Paragraphs end at \\par; \\line is a line break, \\tab a tab.
- Headings: a paragraph with \\outlinelevelN (0-based), directly or through its
  style (\\sN, whose stylesheet entry has \\outlinelevel or is named "heading N").
- Lists: a paragraph with \\lsN is a list item ("- item", two spaces of indent per
  \\ilvl); the label the writer put in {\\listtext} or {\\pntext} is left out.
- Tables: paragraphs marked \\intbl form cells ending at \\cell and rows at \\row.
- Left out: font, colour, style, list and revision tables, document information (its
  \\title becomes the title), pictures (\\pict, \\shppict), embedded objects except
  their result, page headers and footers, field instructions (a field's result is
  kept), and every destination marked ignorable with \\*. Footnotes (\\footnote) follow
  at the end of the document as "[n] note" paragraphs.
"""

from __future__ import annotations

import codecs
import re
from dataclasses import dataclass, field

from .blocks import (
    DocumentFailure,
    PagePart,
    ReaderInput,
    ReadResult,
    flush_list,
    heading_block,
    inline,
    paragraph_block,
    table_or_paragraphs,
)

_TOKEN = re.compile(
    rb"\\([a-zA-Z]{1,32})(-?\d{1,10})? ?|\\'([0-9a-fA-F]{2})|\\(.)|([{}])|([\r\n]+)|([^\\{}\r\n]+)",
    re.DOTALL,
)

# Destinations whose text is not document text (RTF 1.9.1; LibreOffice and Word extras).
_SKIP = {
    "fonttbl", "colortbl", "stylesheet", "info", "pict", "shppict", "nonshppict", "object",
    "header", "headerl", "headerr", "headerf", "footer", "footerl", "footerr", "footerf",
    "fldinst", "listtable", "listoverridetable", "revtbl", "rsidtbl", "generator",
    "xmlnstbl", "themedata", "colorschememapping", "datastore", "latentstyles",
    "listtext", "pntext", "pntxta", "pntxtb", "pgdsctbl", "bkmkstart", "bkmkend",
    "filetbl", "mmathPr", "operator", "author", "company", "xe", "tc", "template",
    "docvar", "sp", "sn", "sv", "userprops", "wgrffmtfilter", "fchars", "lchars",
    "pnseclvl", "atnid", "atnauthor", "annotation", "atrfstart", "atrfend", "ftnsep",
    "ftnsepc", "aftnsep", "aftnsepc", "blipuid", "picprop", "objdata", "objclass",
}
_FCHARSET = {0: "cp1252", 1: None, 2: None, 77: "mac-roman", 128: "cp932", 129: "cp949",
             134: "gbk", 136: "big5", 161: "cp1253", 162: "cp1254", 163: "cp1258",
             177: "cp1255", 178: "cp1256", 186: "cp1257", 204: "cp1251", 222: "cp874",
             238: "cp1250", 255: "cp437"}
_HEADING_NAME = re.compile(r"^heading\s*(\d)", re.IGNORECASE)


def _codec(name: str | None, fallback: str) -> str:
    if not name:
        return fallback
    try:
        return codecs.lookup(name).name
    except LookupError:
        return fallback


@dataclass
class _State:
    skip: bool = False
    uc: int = 1
    font: int | None = None
    dest: str = ""  # the destination this group opened ("fonttbl", "footnote", ...)
    opens_entry: bool = False  # this group is one font or style table entry


@dataclass
class _Para:
    text: list[str] = field(default_factory=list)
    outline: int | None = None
    style: int | None = None
    list_level: int | None = None
    in_table: bool = False


class _Reader:
    def __init__(self, data: bytes):
        self.data = data
        self.codepage = "cp1252"
        self.fonts: dict[int, str] = {}
        self.styles: dict[int, int] = {}  # style number -> heading level (1-based)
        self.title = ""
        self.blocks: list = []
        self.list_items: list[str] = []
        self.rows: list[list[str]] = []
        self.cells: list[str] = []
        self.notes: list[str] = []
        self.pending = bytearray()  # \'hh bytes waiting to be decoded together

    # --- text -------------------------------------------------------------------
    def _encoding(self, state: _State) -> str:
        if state.font is not None and state.font in self.fonts:
            return self.fonts[state.font]
        return self.codepage

    def run(self) -> None:
        stack: list[_State] = []
        state = _State()
        para = _Para()
        out: list[str] = para.text  # where text goes (a paragraph, a note, a table name)
        skip_chars = 0
        group_text: list[list[str]] = []  # text of the groups that collect it (fonttbl...)
        note: list[str] | None = None
        data = self.data
        pos = 0
        # Font and style table entries: collected as small records while inside them.
        entry: dict = {}

        def emit(text: str) -> None:
            nonlocal skip_chars
            if skip_chars:
                cut = min(skip_chars, len(text))
                text, skip_chars = text[cut:], skip_chars - cut
            if not text:
                return
            if state.dest == "title" or state.dest.startswith("entry:"):
                if group_text:
                    group_text[-1].append(text)
                return
            if state.skip:
                return
            (note if note is not None and state.dest == "footnote" else out).append(text)

        def flush_bytes() -> None:
            if self.pending:
                emit(bytes(self.pending).decode(self._encoding(state), errors="replace"))
                self.pending.clear()

        while pos < len(data):
            m = _TOKEN.match(data, pos)
            if m is None:  # a lone backslash at the end
                break
            pos = m.end()
            word, arg, hexbyte, symbol, brace, _newline, text = m.groups()
            if hexbyte is not None:
                if skip_chars:
                    skip_chars -= 1
                    continue
                self.pending.append(int(hexbyte, 16))
                continue
            flush_bytes()
            if brace == b"{":
                stack.append(state)
                state = _State(state.skip, state.uc, state.font, state.dest)
                if state.dest in ("fonttbl", "stylesheet"):
                    entry = {"dest": state.dest}
                    state.dest = "entry:" + state.dest
                    state.opens_entry = True
                    group_text.append([])
                continue
            if brace == b"}":
                if state.opens_entry and group_text:
                    self._finish_entry(entry, "".join(group_text.pop()))
                elif state.dest == "title" and group_text and not (stack and stack[-1].dest == "title"):
                    self.title = inline("".join(group_text.pop()))
                elif state.dest == "footnote" and not (stack and stack[-1].dest == "footnote"):
                    if note is not None:
                        self.notes.append(inline("".join(note)))
                    note = None
                state = stack.pop() if stack else _State()
                continue
            if text is not None:
                emit(text.decode("latin-1"))
                continue
            if _newline is not None:
                continue
            if symbol is not None:
                if symbol == b"*":
                    state.skip = True
                elif symbol == b"~":
                    emit("\u00a0")
                elif symbol in (b"\\", b"{", b"}"):
                    emit(symbol.decode())
                elif symbol in (b"\n", b"\r"):
                    para, out = self._end_paragraph(para, out)
                elif symbol == b"-":
                    pass  # optional hyphen
                elif symbol == b"_":
                    emit("\u2011")
                continue
            name = word.decode("ascii")
            value = int(arg) if arg is not None else None
            if name == "bin":  # binary data of the given length follows
                pos += max(0, value or 0)
                continue
            if name in _SKIP:
                if name in ("fonttbl", "stylesheet"):
                    state.dest = name
                    state.skip = True
                elif name == "info":
                    state.dest = "info"
                    state.skip = True
                else:
                    state.skip = True
                    state.dest = name
                continue
            if state.dest.startswith("entry:"):
                if name == "f" and value is not None:
                    entry["f"] = value
                elif name == "fcharset" and value is not None:
                    entry["charset"] = value
                elif name == "cpg" and value is not None:
                    entry["cpg"] = value
                elif name == "s" and value is not None:
                    entry["s"] = value
                elif name == "outlinelevel" and value is not None:
                    entry["outline"] = value
                continue
            if name == "title" and state.dest == "info":
                state.dest = "title"
                group_text.append([])
                continue
            if state.dest in ("info",) or (state.skip and name not in ("u", "uc")):
                continue
            if name == "ansicpg" and value:
                self.codepage = _codec(f"cp{value}", self.codepage)
            elif name == "u" and value is not None:
                emit(chr(value + 65536 if value < 0 else value))
                skip_chars = state.uc
            elif name == "uc" and value is not None:
                state.uc = max(0, value)
            elif name == "f" and value is not None:
                state.font = value
            elif name == "footnote":
                state.dest = "footnote"
                note = []
            elif name in ("par", "sect"):
                if state.dest == "footnote" and note is not None:
                    note.append(" ")
                else:
                    para, out = self._end_paragraph(para, out)
            elif name == "line":
                emit("\n")
            elif name == "tab":
                emit("\t")
            elif name == "pard":
                para.outline = para.style = para.list_level = None
                para.in_table = False
            elif name == "outlinelevel" and value is not None:
                para.outline = value
            elif name == "s" and value is not None:
                para.style = value
            elif name == "ls":
                para.list_level = para.list_level or 0
            elif name == "ilvl" and value is not None:
                para.list_level = value
            elif name == "intbl":
                para.in_table = True
            elif name in ("cell", "nestcell"):
                flush_list(self.blocks, self.list_items)
                self.cells.append(inline("".join(para.text)))
                para.text.clear()
            elif name == "row":
                if self.cells:
                    self.rows.append(self.cells)
                self.cells = []
                para.text.clear()
            elif name in ("emdash", "endash", "bullet", "lquote", "rquote", "ldblquote", "rdblquote"):
                emit({"emdash": "\u2014", "endash": "\u2013", "bullet": "\u2022",
                      "lquote": "\u2018", "rquote": "\u2019", "ldblquote": "\u201c",
                      "rdblquote": "\u201d"}[name])
        flush_bytes()
        self._end_paragraph(para, out)
        self._end_table()
        flush_list(self.blocks, self.list_items)
        for n, text in enumerate(self.notes, start=1):
            block = paragraph_block(f"[{n}] {text}")
            if block:
                self.blocks.append(block)

    def _finish_entry(self, entry: dict, text: str) -> None:
        name = text.strip().rstrip(";").strip()
        if entry.get("dest") == "fonttbl" and "f" in entry:
            charset = _FCHARSET.get(entry.get("charset", 0))
            cpg = entry.get("cpg")
            self.fonts[entry["f"]] = _codec(f"cp{cpg}" if cpg else charset, self.codepage)
        elif entry.get("dest") == "stylesheet":
            number = entry.get("s", 0)
            if "outline" in entry:
                self.styles[number] = entry["outline"] + 1
            else:
                found = _HEADING_NAME.match(name)
                if found:
                    self.styles[number] = int(found.group(1))

    def _end_table(self) -> None:
        if self.cells:
            self.rows.append(self.cells)
            self.cells = []
        if not self.rows:
            return
        rows, self.rows = self.rows, []
        self.blocks.extend(table_or_paragraphs(rows))

    def _end_paragraph(self, para: _Para, out: list[str]) -> tuple[_Para, list[str]]:
        text = "".join(para.text)
        para.text.clear()
        if para.in_table:
            flush_list(self.blocks, self.list_items)
            if text.strip():
                # A paragraph break inside a cell: the cell goes on.
                para.text.append(text + " ")
            return para, para.text
        self._end_table()
        level = None
        if para.outline is not None and 0 <= para.outline <= 8:
            level = para.outline + 1
        elif para.style is not None and para.style in self.styles:
            level = self.styles[para.style]
        if text.strip():
            if level:
                flush_list(self.blocks, self.list_items)
                block = heading_block(text, level)
                if block:
                    self.blocks.append(block)
            elif para.list_level is not None:
                self.list_items.append("  " * min(para.list_level, 8) + "- " + inline(text))
            else:
                flush_list(self.blocks, self.list_items)
                block = paragraph_block(text)
                if block:
                    self.blocks.append(block)
        return para, para.text


def read_rtf(inp: ReaderInput) -> ReadResult:
    if not inp.data.lstrip().startswith(b"{\\rtf"):
        raise DocumentFailure("unreadable RTF: it does not start with {\\rtf")
    reader = _Reader(inp.data)
    try:
        reader.run()
    except (ValueError, IndexError, OverflowError) as exc:  # malformed control words
        raise DocumentFailure(f"unreadable RTF: {type(exc).__name__}: {exc}", exc) from exc
    part = PagePart(page=None, blocks=reader.blocks)
    if not reader.blocks:
        part.warnings.append("no text (the document body is empty)")
    return ReadResult(format="rtf", method="rtf", pages=[part], title=reader.title,
                      encoding=reader.codepage)
