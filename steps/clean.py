"""Clean extracted pages: mojibake, invisible characters, Unicode form, whitespace,
line-end hyphens and lines that repeat on most pages of a document.

Each block is cleaned on its own, so block structure (and therefore the page text,
blocks joined by units.BLOCK_SEP) survives. Per block, in this order:

  1. line breaks: CR LF, CR, VT, FF, NEL, U+2028, U+2029 become "\\n" (so step 4 does
     not glue lines together);
  2. terminal escapes: ANSI colour/cursor sequences ("ESC [ 31 m", pasted logs) are
     removed whole (ftfy.fixes.remove_terminal_escapes), before step 4 would remove
     only the ESC and leave "[31m" behind;
  3. mojibake (`repair_mojibake`): ftfy repairs text that was decoded with the wrong
     codec ("cafÃ©" -> "café", "â€œ" -> a curly quote, C1 controls that are really
     windows-1252 punctuation). Only ftfy's encoding fixes run: fix_encoding,
     restore_byte_a0, replace_lossy_sequences, decode_inconsistent_utf8 and
     fix_c1_controls. Its other fixes are off because another rule here owns that
     change and counts it, or because it would alter correct text: normalization=None
     and fix_latin_ligatures / fix_character_width off (step 5 does Unicode forms,
     configurably), fix_line_breaks off (step 1), remove_control_chars off (step 4),
     fix_surrogates off (step 4), unescape_html off (extraction already decoded HTML
     entities; in plain text "&amp;" is meant literally), uncurl_quotes off (curly
     quotes are correct text). Mojibake comes before step 4 because C1 controls and
     soft hyphens can be bytes of a mis-decoded character ("Ã\\xad" is "í"). Pure
     ASCII text cannot be mojibake, so it skips ftfy (most text; ftfy is slow);
  4. removals: other C0/C1 control characters (keeping "\\n" and "\\t"), lone
     surrogates (they cannot be written as UTF-8), zero-width characters
     (U+200B..U+200D, U+2060, U+FEFF) and soft hyphens (U+00AD; one at a line end
     joins the two lines, as it marks where a word was broken). Removal comes before
     normalisation so that a mark separated from its base by a zero-width space can
     still compose with it;
  5. Unicode normalisation (NFKC by default: folds ligatures, full-width forms and
     no-break spaces into their plain forms; NFC, NFD, NFKD or none);
  6. whitespace: in headings, paragraphs and tables each run of spaces, tabs and other
     Unicode spaces becomes one space and lines are trimmed; a heading becomes one
     line. CODE keeps its lines and indentation and only loses trailing spaces.
     Empty lines are removed everywhere, because block texts never contain "\\n\\n"
     (that is the block separator).

Then across the document's pages (so the step needs all pages of a document):

  7. de-hyphenation (`dehyphenate`), in paragraphs only: a line that ends in a letter
     and "-" (or U+2010), followed by a line that starts with a lowercase letter, is
     one word broken at the line end ("coop-" / "erative"). The lines are joined; the
     hyphen is kept when the document elsewhere writes that word with the hyphen more
     often than without it ("non-members" seen, "nonmembers" not), and otherwise
     dropped (common practice, and what pdftotext does; the document's own spelling
     is our refinement). PDF extraction joins its lines itself, so this mostly meets
     plain text and other hard-wrapped paragraphs;
  8. boilerplate within a document (`remove_boilerplate`): a paragraph line that
     occurs on at least `boilerplate_min_share` of the document's pages and on at
     least `boilerplate_min_pages` pages is removed wherever it occurs; payload
     `removed` records each line taken from the page ({kind: "repeated line", text,
     reason}, the shape extraction and the boilerplate step use too) and a warning
     sums them up. (Common practice; thresholds ours.) Lines compare exactly (after
     the whitespace rule), except lines without a letter, which compare with digit
     runs masked ("- 12 -" matches "- 13 -"): masking digits in lines with words
     would make "Week 3 total: 12" on every page of a report boilerplate. Running
     headers and footers such as "Page 3 of 9" are the PDF reader's job, as it knows
     where on the page a line sits (extract/pdf.py); blocks repeated across the pages of
     an HTML site are the boilerplate step's (steps/boilerplate.py). Headings, tables
     and code are never removed this way: a repeated table header or heading is
     structure. A document of one page (plain text, HTML, Word, Markdown) has no pages
     to compare, so nothing is removed from it;
  9. blocks left empty are dropped.

Counts (payload `fixes`, only fixes that happened are listed):
  line_breaks, terminal_escapes, control_chars, surrogates, zero_width, soft_hyphens,
  whitespace: characters changed or removed;
  mojibake: characters of the repaired text that a repair produced;
  unicode_normalization: base-character-plus-marks sequences the form changed;
  dehyphenated: words joined across a line end;
  blank_lines, boilerplate_lines, empty_blocks: lines or blocks removed.

`chars_removed` counts every character the removals took out (steps 2, 4, 6-9); the
length changes of repairs and normalisation (NFKC turns U+FB01 into "fi") are not
removals. `removed_share` is the share of the page's non-whitespace characters that
were removed (collapsing spaces loses no text, so it does not count). A page whose
share exceeds `max_removed_share` gets a warning and `heavy_removal` true; a page
with nothing left is dropped with a reason listing the fixes, never silently emptied.
"""

from __future__ import annotations

import difflib
import math
import re
import unicodedata
from collections import Counter, defaultdict
from dataclasses import dataclass, field, replace
from typing import Literal

from pydantic import Field

from .spec import StepParams, StepSpec
from .units import CODE, HEADING, PARAGRAPH, Block, Page

ZERO_WIDTH = "\u200b\u200c\u200d\u2060\ufeff"
SOFT_HYPHEN = "\u00ad"

_CRLF = "\r\n"
_LINE_BREAKS = re.compile("[\r\x0b\x0c\x85\u2028\u2029]")
# C0 and C1 controls except \t (09) and \n (0A); \v \f \r were turned into \n above.
_CONTROL = re.compile("[\x00-\x08\x0e-\x1f\x7f-\x84\x86-\x9f]")
_SURROGATE = re.compile("[\ud800-\udfff]")
_ZERO_WIDTH = re.compile(f"[{ZERO_WIDTH}]")
_SOFT_HYPHEN = re.compile(SOFT_HYPHEN)
# A soft hyphen at a line end: the word continues on the next line.
_SOFT_HYPHEN_BREAK = re.compile(f"{SOFT_HYPHEN}[^\\S\\n]*\\n[^\\S\\n]*")
# Steps 1-4 change nothing in ASCII text without these (line breaks other than "\n",
# ESC and the other controls): most text skips their passes after one search.
_ASCII_TOUCHED = re.compile("[\x00-\x08\x0b-\x1f\x7f]")
# A hyphen (ASCII or U+2010) ending a line after a letter, the next line's first word.
_LINE_END_HYPHEN = re.compile(r"([^\W\d_]+)([-\u2010])\n(\w+)")
# What dehyphenate_text looks for first, and the letters before such a hyphen.
_HYPHEN_BREAK = re.compile("[-\u2010]\n")
_LETTERS_TO_END = re.compile(r"[^\W\d_]+$")
_WORD = re.compile(r"\w+(?:[-\u2010]\w+)*")
_DIGITS = re.compile(r"\d+")

NO_TEXT_LEFT = "no text left after cleaning"


class CleanParams(StepParams):
    normalization: Literal["NFKC", "NFC", "NFD", "NFKD", "none"] = "NFKC"
    max_removed_share: float = Field(0.5, ge=0.0, le=1.0)
    repair_mojibake: bool = True
    dehyphenate: bool = True
    remove_boilerplate: bool = True
    boilerplate_min_pages: int = Field(3, ge=2)
    boilerplate_min_share: float = Field(0.5, gt=0.0, le=1.0)


# ftfy's encoding repairs only; see the module docstring for why each other fix is off.
def _ftfy_config():
    from ftfy import TextFixerConfig

    return TextFixerConfig(
        unescape_html=False,
        remove_terminal_escapes=False,
        fix_encoding=True,
        restore_byte_a0=True,
        replace_lossy_sequences=True,
        decode_inconsistent_utf8=True,
        fix_c1_controls=True,
        fix_latin_ligatures=False,
        fix_character_width=False,
        uncurl_quotes=False,
        fix_line_breaks=False,
        fix_surrogates=False,
        remove_control_chars=False,
        normalization=None,
        explain=False,
    )


_FTFY_CONFIG = None


def repair_mojibake(text: str) -> tuple[str, int]:
    """(repaired text, characters a repair produced). ASCII text is returned as is."""
    global _FTFY_CONFIG
    if text.isascii():
        return text, 0
    import ftfy

    if _FTFY_CONFIG is None:
        _FTFY_CONFIG = _ftfy_config()
    # Line by line, as ftfy itself works, so the count compares short strings only.
    lines = text.split("\n")
    repaired = 0
    for i, line in enumerate(lines):
        if line.isascii():
            continue
        fixed = ftfy.fix_text(line, _FTFY_CONFIG)
        if fixed != line:
            ops = difflib.SequenceMatcher(None, line, fixed, autojunk=False).get_opcodes()
            repaired += sum(max(j2 - j1, 1) for tag, _, _, j1, j2 in ops if tag != "equal")
            lines[i] = fixed
    return ("\n".join(lines), repaired) if repaired else (text, 0)


def normalize(text: str, form: str) -> str:
    """The Unicode normalisation the step applies ("none" leaves the text alone)."""
    return text if form == "none" else unicodedata.normalize(form, text)


_SPACE_SPLIT = re.compile(r"(?=[ \n])")


def _count_normalization_changes(text: str, form: str) -> int:
    """Number of sequences (a base character and its combining marks) that `form` changes.

    Only words that are not already normalised are walked character by character (a
    space or line break starts a new sequence, so words can be judged apart)."""
    if unicodedata.is_normalized(form, text):
        return 0
    changed = 0
    for word in _SPACE_SPLIT.split(text):
        if unicodedata.is_normalized(form, word):
            continue
        start = 0
        for i in range(1, len(word) + 1):
            if i == len(word) or unicodedata.combining(word[i]) == 0:
                segment = word[start:i]
                if unicodedata.normalize(form, segment) != segment:
                    changed += 1
                start = i
    return changed


_ASCII_SPACES = "".join(c for c in map(chr, range(128)) if c.isspace())


def _visible(text: str) -> int:
    """Characters that are not whitespace."""
    if text.isascii():  # counting is much cheaper than splitting
        return len(text) - sum(text.count(c) for c in _ASCII_SPACES)
    return len("".join(text.split()))


@dataclass
class _Tally:
    """What cleaning did to one page."""

    fixes: dict[str, int] = field(default_factory=dict)
    # Length and visible-length changes of repairs and normalisation (not removals).
    grown: int = 0
    grown_visible: int = 0
    removed: list[dict] = field(default_factory=list)  # lines rule 8 took out

    def bump(self, name: str, count: int) -> None:
        if count:
            self.fixes[name] = self.fixes.get(name, 0) + count

    def changed(self, before: str, after: str) -> None:
        self.grown += len(after) - len(before)
        self.grown_visible += _visible(after) - _visible(before)


def _bump(fixes: dict[str, int], name: str, count: int) -> None:
    if count:
        fixes[name] = fixes.get(name, 0) + count


def clean_text(text: str, kind: str, normalization: str, fixes: dict[str, int],
               mojibake: bool = True, tally: _Tally | None = None) -> str:
    """Steps 1-6 for one block's text, adding what was fixed to `fixes`."""
    if not (text.isascii() and not _ASCII_TOUCHED.search(text)):
        # ASCII text is already in every normal form and cannot be mojibake.
        text = _repair_and_remove(text, normalization, fixes, mojibake, tally)
    return _whitespace(text, kind, fixes)


def _repair_and_remove(text: str, normalization: str, fixes: dict[str, int], mojibake: bool,
                       tally: _Tally | None) -> str:
    """Steps 1-5."""
    from ftfy.fixes import remove_terminal_escapes

    crlf = text.count(_CRLF)
    text = text.replace(_CRLF, "\n")
    text, breaks = _LINE_BREAKS.subn("\n", text)
    _bump(fixes, "line_breaks", crlf + breaks)

    if "\x1b" in text:
        before = len(text)
        text = remove_terminal_escapes(text)
        _bump(fixes, "terminal_escapes", before - len(text))

    if mojibake:
        fixed, repaired = repair_mojibake(text)
        if repaired:
            _bump(fixes, "mojibake", repaired)
            if tally is not None:
                tally.changed(text, fixed)
            text = fixed

    text, joined = _SOFT_HYPHEN_BREAK.subn("", text)
    _bump(fixes, "soft_hyphens", joined)
    for name, pattern in (
        ("control_chars", _CONTROL),
        ("surrogates", _SURROGATE),
        ("zero_width", _ZERO_WIDTH),
        ("soft_hyphens", _SOFT_HYPHEN),
    ):
        text, n = pattern.subn("", text)
        _bump(fixes, name, n)

    if normalization != "none":
        _bump(fixes, "unicode_normalization", _count_normalization_changes(text, normalization))
        normal = normalize(text, normalization)
        if tally is not None and normal != text:
            tally.changed(text, normal)
        text = normal
    return text


def _whitespace(text: str, kind: str, fixes: dict[str, int]) -> str:
    """Step 6. str.split() splits at the characters str.isspace() names, the same that
    the regular expression class \\s matches."""
    before = len(text)
    if kind == CODE:
        lines = [line.rstrip() for line in text.split("\n")]
    elif kind == HEADING:
        lines = [" ".join(text.split())]
    else:
        lines = [" ".join(line.split()) for line in text.split("\n")]
    kept = [line for line in lines if line]
    text = "\n".join(kept)
    if kept:
        _bump(fixes, "blank_lines", len(lines) - len(kept))
    # Characters the whitespace rules removed, not counting the dropped line breaks.
    removed_breaks = (len(lines) - 1) - max(len(kept) - 1, 0)
    _bump(fixes, "whitespace", before - len(text) - removed_breaks)
    return text


# -- document-wide rules -------------------------------------------------------


def _vocabulary(pages: list[list[Block]]) -> Counter:
    """Casefolded words (hyphenated compounds as one word) on one line, document-wide."""
    seen: Counter = Counter()
    for blocks in pages:
        for block in blocks:
            if block.kind != CODE:
                seen.update(_WORD.findall(block.text))
    words: Counter = Counter()
    for word, n in seen.items():  # each distinct spelling casefolded once
        words[word.casefold()] += n
    return words


def dehyphenate_text(text: str, vocabulary: Counter) -> tuple[str, int]:
    """Join words broken by a hyphen at a line end (rule 7). Returns (text, joins)."""
    joins = 0

    def join(match: re.Match) -> str:
        nonlocal joins
        left, hyphen, right = match.group(1), match.group(2), match.group(3)
        if not right[0].islower():
            return match.group(0)
        joins += 1
        closed = (left + right).casefold()
        hyphenated = (left + "-" + right).casefold()
        keep = vocabulary.get(hyphenated, 0) > vocabulary.get(closed, 0)
        return left + (hyphen if keep else "") + right

    # The matches _LINE_END_HYPHEN.sub would make, in order, found from the line-end
    # hyphens: sub tries every position of the text and backtracks through every
    # word, several times slower on hard-wrapped text. A match starts where the run of
    # letters before a hyphen starts (never before the previous match's end).
    parts, done = [], 0
    for hyphen in _HYPHEN_BREAK.finditer(text):
        h = hyphen.start()
        if h <= done:
            continue
        run = _LETTERS_TO_END.search(text, max(done, text.rfind("\n", 0, h) + 1), h)
        match = _LINE_END_HYPHEN.match(text, run.start()) if run else None
        if match:
            parts += [text[done:match.start()], join(match)]
            done = match.end()
    return ("".join(parts) + text[done:] if parts else text), joins


def _line_key(line: str) -> str:
    return line if any(ch.isalpha() for ch in line) else _DIGITS.sub("0", line)


def boilerplate_keys(pages: list[list[Block]], min_pages: int,
                     min_share: float) -> tuple[dict[str, int], int]:
    """Keys of paragraph lines that recur on enough of the document's pages (rule 8),
    each with the number of pages it stands on; and the number of pages with text."""
    with_text = [blocks for blocks in pages if any(b.text for b in blocks)]
    need = max(min_pages, math.ceil(min_share * len(with_text)))
    if len(with_text) < need:
        return {}, len(with_text)
    seen: dict[str, int] = defaultdict(int)
    for blocks in with_text:
        keys = {_line_key(line) for b in blocks if b.kind == PARAGRAPH
                for line in b.text.split("\n") if line}
        for key in keys:
            seen[key] += 1
    return {key: n for key, n in seen.items() if n >= need}, len(with_text)


def _remove_lines(block: Block, keys: dict[str, int], pages: int, params: CleanParams,
                  tally: _Tally) -> Block:
    lines = block.text.split("\n")
    kept = [line for line in lines if _line_key(line) not in keys]
    if len(kept) == len(lines):
        return block
    for line in lines:
        key = _line_key(line)
        if key in keys and all(r["text"] != line for r in tally.removed):
            tally.removed.append({
                "kind": "repeated line",
                "text": line,
                "reason": f"the same line stands on {keys[key]} of the document's {pages} "
                          f"pages (at least {params.boilerplate_min_pages} pages and "
                          f"{params.boilerplate_min_share:.0%} of them)",
            })
    tally.bump("boilerplate_lines", len(lines) - len(kept))
    return replace(block, text="\n".join(kept))


# -- the step ------------------------------------------------------------------


def _finish(page: Page, blocks: list[Block], tally: _Tally, params: CleanParams) -> Page:
    empty = sum(1 for b in blocks if not b.text)
    tally.bump("empty_blocks", empty)
    blocks = [b for b in blocks if b.text]
    out = Page(
        locator=page.locator,
        page=page.page,
        blocks=blocks,
        title=page.title,
        format=page.format,
        language=page.language,
        language_prob=page.language_prob,
        parents=[page.locator],
    )
    text_in, text_out = page.text, out.text
    # Removals are what the length lost beyond what repairs and normalisation changed.
    removed = len(text_in) - len(text_out) + tally.grown
    visible_in = _visible(text_in)
    removed_visible = visible_in - _visible(text_out) + tally.grown_visible
    share = removed_visible / visible_in if visible_in else 0.0
    heavy = share > params.max_removed_share
    out.payload = {
        "fixes": dict(sorted(tally.fixes.items())),
        "chars_removed": max(0, removed),
        "removed_share": share,
        "heavy_removal": heavy,
        "removed": list(tally.removed),
    }
    if tally.removed:
        out.warnings.append(
            f"removed {tally.fixes['boilerplate_lines']} line(s) that stand on most pages: "
            + "; ".join(repr(r["text"][:60]) for r in tally.removed)
        )
    if heavy:
        out.warnings.append(
            f"cleaning removed {share:.0%} of the page's text ({removed_visible} of "
            f"{visible_in} non-space characters), more than max_removed_share "
            f"{params.max_removed_share:.0%}; the extracted text may be damaged"
        )
    if not out.text.strip():
        if text_in:
            detail = ", ".join(f"{name} {count}" for name, count in sorted(tally.fixes.items()))
            out.drop(f"{NO_TEXT_LEFT} (all {len(text_in)} characters removed; fixes: {detail})")
        else:
            out.drop(f"{NO_TEXT_LEFT} (the page had no text)")
    return out


def clean(pages: list[Page], params: CleanParams, ctx=None) -> list[Page]:
    """Page step: one cleaned page per input page, in the same order."""
    tallies = [_Tally() for _ in pages]
    cleaned: list[list[Block]] = []
    for page, tally in zip(pages, tallies):
        blocks = []
        for block in page.blocks:
            text = clean_text(block.text, block.kind, params.normalization, tally.fixes,
                              mojibake=params.repair_mojibake, tally=tally)
            # Blocks are never changed in place: an unchanged one is shared, not copied.
            blocks.append(block if text == block.text else replace(block, text=text))
        cleaned.append(blocks)

    if params.dehyphenate:
        vocabulary = None  # built only for a document that has a line-end hyphen
        for blocks, tally in zip(cleaned, tallies):
            for i, block in enumerate(blocks):
                if block.kind == PARAGRAPH and ("-\n" in block.text or "\u2010\n" in block.text):
                    if vocabulary is None:
                        vocabulary = _vocabulary(cleaned)
                    text, joins = dehyphenate_text(block.text, vocabulary)
                    tally.bump("dehyphenated", joins)
                    blocks[i] = replace(block, text=text)

    if params.remove_boilerplate:
        keys, with_text = boilerplate_keys(cleaned, params.boilerplate_min_pages,
                                           params.boilerplate_min_share)
        if keys:
            for blocks, tally in zip(cleaned, tallies):
                blocks[:] = [_remove_lines(b, keys, with_text, params, tally)
                             if b.kind == PARAGRAPH else b for b in blocks]

    return [_finish(page, blocks, tally, params)
            for page, blocks, tally in zip(pages, cleaned, tallies)]


def clean_page(page: Page, params: CleanParams) -> Page:
    """One page on its own (no other pages to compare for boilerplate)."""
    return clean([page], params)[0]


CLEAN = StepSpec(
    name="clean",
    version="2",
    consumes="pages",
    produces="pages",
    scope="document",
    params=CleanParams,
    run=clean,
    summary="mojibake repair, invisible characters, Unicode normalisation, whitespace, "
            "line-end hyphens, repeated boilerplate lines",
)
