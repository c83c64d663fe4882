"""Is a PDF page's text layer readable, or does it map glyphs to the wrong characters?

A text layer can look like text and still be wrong: fonts whose glyphs map to the wrong
code points give words that mix scripts no language writes together (Debian's Hindi
reference card, refcard-hi-a4.pdf, gives Devanagari words with Cyrillic and Armenian
letters inside), private-use code points, runs of U+FFFD, or pdfminer's "(cid:N)"
placeholders. A page is unreadable when (thresholds ours, common practice; checked on
every reference card of the debian-refcard package in tests/test_extract_text_layer.py):

* at least MIXED_MIN words, and MIXED_SHARE of its words, mix two scripts (Latin with
  Han, kana or Hangul, and Han with kana, are written together and do not count), or
* at least MARK_MIN private-use characters, U+FFFD characters or "(cid:N)" placeholders,
  making MARK_SHARE of its characters.

The script of a letter is the first word of its Unicode name (LATIN, CYRILLIC,
DEVANAGARI, ...). Pure: text in, a reason or "" out.
"""

from __future__ import annotations

import re
import unicodedata
from collections import Counter
from functools import lru_cache

MIXED_MIN = 3
MIXED_SHARE = 0.02
MARK_MIN = 3
MARK_SHARE = 0.01

_CJK = {"CJK", "HIRAGANA", "KATAKANA", "KATAKANA-HIRAGANA", "HANGUL", "IDEOGRAPHIC", "HALFWIDTH"}
_WORD = re.compile(r"\w+")
_CID = re.compile(r"\(cid:\d+\)")
# Unicode's private-use areas, exactly the characters of general category Co.
_PRIVATE_USE = re.compile("[\ue000-\uf8ff\U000f0000-\U000ffffd\U00100000-\U0010fffd]")


@lru_cache(maxsize=4096)  # a page has few distinct letters; names were looked up per letter
def _script(ch: str) -> str:
    try:
        first = unicodedata.name(ch).split()[0]
    except ValueError:
        return "?"
    return "CJK" if first in _CJK else first


def mixed_words(text: str) -> Counter:
    """Words that mix scripts no language writes together, by script pair."""
    out: Counter = Counter()
    for word in _WORD.findall(text):
        if word.isascii():  # Latin letters, digits and underscore: one script at most
            continue
        scripts = {_script(c) for c in word if c.isalpha()}
        if "CJK" in scripts:
            scripts.discard("LATIN")
        if len(scripts) > 1:
            out["+".join(sorted(scripts)).lower()] += 1
    return out


def unreadable(text: str) -> str:
    """Why the text layer is unreadable, or "" when it reads as text."""
    # ASCII text has no mixed-script word, private-use or replacement character: only
    # "(cid:N)" placeholders are looked for (most pages of most drives).
    ascii_only = text.isascii()
    mixed = Counter() if ascii_only else mixed_words(text)
    n_mixed = sum(mixed.values())
    if n_mixed >= MIXED_MIN:
        words = len(_WORD.findall(text))
        if n_mixed >= MIXED_SHARE * words:
            pairs = ", ".join(f"{pair} {n}" for pair, n in mixed.most_common(3))
            return (f"text layer maps glyphs to the wrong characters: {n_mixed} of {words} words "
                    f"mix scripts no language writes together ({pairs})")
    marks = {
        "private-use characters": 0 if ascii_only else len(_PRIVATE_USE.findall(text)),
        "replacement characters (U+FFFD)": 0 if ascii_only else text.count("\ufffd"),
        "(cid:N) placeholders": len(_CID.findall(text)),
    }
    for what, n in marks.items():
        if n >= MARK_MIN and n >= MARK_SHARE * max(len(text), 1):
            return f"text layer has {n} {what} in {len(text)} characters"
    return ""
