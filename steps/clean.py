"""Clean extracted pages: Unicode normalisation, invisible characters, whitespace.

Each block is cleaned on its own, so block structure (and therefore the page text,
blocks joined by units.BLOCK_SEP) survives. The order matters:

  1. line breaks: CR LF, CR, VT, FF, NEL, U+2028, U+2029 become "\\n" (so step 2 does
     not glue lines together);
  2. removals: other C0/C1 control characters (keeping "\\n" and "\\t"), lone
     surrogates (they cannot be written as UTF-8), zero-width characters
     (U+200B..U+200D, U+2060, U+FEFF) and soft hyphens (U+00AD). Removal comes before
     normalisation so that a mark separated from its base by a zero-width space can
     still compose with it;
  3. Unicode normalisation (NFKC by default: folds ligatures, full-width forms and
     no-break spaces into their plain forms);
  4. whitespace: in headings, paragraphs and tables each run of spaces, tabs and other
     Unicode spaces becomes one space and lines are trimmed; a heading becomes one
     line. CODE keeps its lines and indentation and only loses trailing spaces.
     Empty lines are removed everywhere, because block texts never contain "\\n\\n"
     (that is the block separator);
  5. blocks left empty are dropped.

Fix counts (payload "fixes"): characters changed per fix, except
`unicode_normalization` (counts changed base-character-plus-marks sequences),
`blank_lines` and `empty_blocks`. Only fixes that happened are listed.
"""

from __future__ import annotations

import re
import unicodedata
from typing import Literal

from pydantic import Field

from .spec import StepParams, StepSpec
from .units import CODE, HEADING, Block, Page

ZERO_WIDTH = "\u200b\u200c\u200d\u2060\ufeff"
SOFT_HYPHEN = "\u00ad"

_CRLF = "\r\n"
_LINE_BREAKS = re.compile("[\r\x0b\x0c\x85\u2028\u2029]")
# C0 and C1 controls except \t (09) and \n (0A); \v \f \r were turned into \n above.
_CONTROL = re.compile("[\x00-\x08\x0e-\x1f\x7f-\x84\x86-\x9f]")
_SURROGATE = re.compile("[\ud800-\udfff]")
_ZERO_WIDTH = re.compile(f"[{ZERO_WIDTH}]")
_SOFT_HYPHEN = re.compile(SOFT_HYPHEN)
# Any whitespace except the line break: spaces, tabs, no-break and other Unicode spaces.
_INLINE_SPACE = re.compile(r"[^\S\n]+")
_TRAILING_SPACE = re.compile(r"[^\S\n]+$", re.MULTILINE)

NO_TEXT_LEFT = "no text left after cleaning"


class CleanParams(StepParams):
    normalization: Literal["NFKC", "NFC", "NFD", "NFKD", "none"] = "NFKC"
    max_removed_share: float = Field(0.5, ge=0.0, le=1.0)


def _count_normalization_changes(text: str, form: str) -> int:
    """Number of sequences (a base character and its combining marks) that `form` changes."""
    if unicodedata.is_normalized(form, text):
        return 0
    changed = 0
    start = 0
    for i in range(1, len(text) + 1):
        if i == len(text) or unicodedata.combining(text[i]) == 0:
            segment = text[start:i]
            if unicodedata.normalize(form, segment) != segment:
                changed += 1
            start = i
    return changed


def _bump(fixes: dict[str, int], name: str, count: int) -> None:
    if count:
        fixes[name] = fixes.get(name, 0) + count


def clean_text(text: str, kind: str, normalization: str, fixes: dict[str, int]) -> str:
    """Clean one block's text, adding what was fixed to `fixes`."""
    crlf = text.count(_CRLF)
    text = text.replace(_CRLF, "\n")
    text, breaks = _LINE_BREAKS.subn("\n", text)
    _bump(fixes, "line_breaks", crlf + breaks)

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
        text = unicodedata.normalize(normalization, text)

    before = len(text)
    if kind == CODE:
        lines = _TRAILING_SPACE.sub("", text).split("\n")
    elif kind == HEADING:
        lines = [_INLINE_SPACE.sub(" ", text.replace("\n", " ")).strip()]
    else:
        lines = [_INLINE_SPACE.sub(" ", line).strip() for line in text.split("\n")]
    kept = [line for line in lines if line.strip()]
    text = "\n".join(kept)
    if kept:
        _bump(fixes, "blank_lines", len(lines) - len(kept))
    # Characters the whitespace rules removed, not counting the dropped line breaks.
    removed_breaks = (len(lines) - 1) - max(len(kept) - 1, 0)
    _bump(fixes, "whitespace", before - len(text) - removed_breaks)
    return text


def clean_page(page: Page, params: CleanParams) -> Page:
    fixes: dict[str, int] = {}
    blocks: list[Block] = []
    for block in page.blocks:
        text = clean_text(block.text, block.kind, params.normalization, fixes)
        if text:
            blocks.append(Block(kind=block.kind, text=text, level=block.level))
        else:
            _bump(fixes, "empty_blocks", 1)

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
    chars_in = len(page.text)
    chars_out = len(out.text)
    # Net shrinkage: normalisation may lengthen text (U+FB01 -> "fi"), offsetting removals.
    removed = max(0, chars_in - chars_out)
    share = removed / chars_in if chars_in else 0.0
    out.payload = {"fixes": dict(sorted(fixes.items())), "chars_removed": removed,
                   "removed_share": share}

    if share > params.max_removed_share:
        out.warnings.append(
            f"cleaning removed {share:.0%} of the page's characters ({removed} of "
            f"{chars_in}), more than max_removed_share {params.max_removed_share:.0%}; "
            f"the extracted text may be damaged"
        )
    if not out.text.strip():
        if chars_in:
            detail = ", ".join(f"{name} {count}" for name, count in sorted(fixes.items()))
            out.drop(f"{NO_TEXT_LEFT} (all {chars_in} characters removed; fixes: {detail})")
        else:
            out.drop(f"{NO_TEXT_LEFT} (the page had no text)")
    return out


def clean(pages: list[Page], params: CleanParams, ctx=None) -> list[Page]:
    """Page step: one cleaned page per input page, in the same order."""
    return [clean_page(page, params) for page in pages]


CLEAN = StepSpec(
    name="clean",
    version="1",
    consumes="pages",
    produces="pages",
    scope="document",
    params=CleanParams,
    run=clean,
    summary="Unicode normalisation, removal of invisible characters, whitespace tidying",
)
