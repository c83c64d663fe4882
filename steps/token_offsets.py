"""Exact token counts of any slice of a text, from one encoding of the whole text.

tiktoken first cuts text into pieces with a regular expression and then encodes each
piece on its own, so a slice's count is the sum of its pieces' counts -- where the
slice cuts at the same piece boundaries as the whole text. A position m where an
ASCII letter is followed by an ASCII character that is neither a letter nor an
apostrophe (an "anchor": "word|.", "word| next") is such a boundary in every text
that holds both characters: in the patterns of cl100k_base, o200k_base, p50k_base
and r50k_base, a piece that holds a letter ends at the end of its run of letters
(o200k_base may add a contraction, which starts with an apostrophe), and a piece
that starts at m depends only on the text after m. So for a slice [s, e):

    count(s, e) = encode(text[s:A]) + (tokens before B) - (tokens before A) + encode(text[B:e])

with A the first anchor at or after s and B the last at or before e; the middle is
read off the whole text's encoding and only the two short edges are encoded again.
Anchors are kept only where a token of the whole encoding ends exactly there.
tests/test_token_offsets.py checks counts against tiktoken on real Debian texts.
"""

from __future__ import annotations

import bisect
import functools

import numpy as np

# The pre-tokenizer patterns the anchor rule was checked against (by their names in
# tiktoken); for any other encoding every count is a direct encode.
ANCHOR_ENCODINGS = frozenset({"cl100k_base", "o200k_base", "p50k_base", "r50k_base", "p50k_edit"})
# Slices shorter than this are encoded directly (cheaper than the look-ups; measured on
# the chunking bench: 48 cost 35 % more time in counting than 16).
_SHORT = 16
# A text shorter than this is not encoded whole: its few counts are direct encodes.
_WHOLE = 96
# Pieces up to this long are remembered per text (counted once).
_EDGE = 24


@functools.lru_cache(maxsize=8)
def _token_bytes(enc) -> np.ndarray:
    """Byte length of every token id of `enc` (0 for ids that are not tokens)."""
    lengths = np.zeros(enc.n_vocab, dtype=np.int64)
    for i in range(enc.n_vocab):
        try:
            lengths[i] = len(enc.decode_single_token_bytes(i))
        except KeyError:
            pass
    return lengths


def _anchor_mask(codes: np.ndarray) -> np.ndarray:
    """True at m (1 <= m < n) when codes[m-1] is an ASCII letter and codes[m] an ASCII
    character that is not a letter or an apostrophe (codes: characters or UTF-8 bytes)."""
    low = codes | 32
    letter = (low >= 97) & (low <= 122)
    right = (codes < 128) & ~letter & (codes != 39)
    mask = np.zeros(len(codes) + 1, dtype=bool)
    mask[1:-1] = letter[:-1] & right[1:]
    return mask


class SliceCounter:
    """encode_ordinary token counts of slices of `text`, exact."""

    def __init__(self, enc, text: str):
        self.enc = enc
        self.text = text
        self.anchors: list[int] = []
        self.before: list[int] = []  # tokens of the whole text before each anchor
        self._edges: dict[str, int] = {}
        if getattr(enc, "name", None) not in ANCHOR_ENCODINGS or len(text) < _WHOLE:
            return
        # encode(text, disallowed_special=()) is encode_ordinary (tiktoken's docstring of
        # encode_ordinary says so); the numpy form skips building a list of ints.
        tokens = enc.encode_to_numpy(text, disallowed_special=())
        byte_ends = np.cumsum(_token_bytes(enc)[tokens])
        # Anchors are ASCII characters, so they sit at the same places in the UTF-8
        # bytes (every byte of a longer character is >= 0x80): found there, then mapped
        # to character offsets.
        data = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
        mask = _anchor_mask(data)
        token_end = np.zeros(len(data) + 1, dtype=bool)
        token_end[byte_ends] = True
        token_end[0] = True
        mask[0] = mask[len(data)] = True
        at_bytes = np.flatnonzero(mask & token_end)  # a token of the whole encoding ends here
        before = np.searchsorted(byte_ends, at_bytes, side="right")
        if text.isascii():
            chars = at_bytes
        else:
            # Characters before byte b: b less the continuation bytes before it.
            continued = np.concatenate(([0], np.cumsum((data & 0xC0) == 0x80)))
            chars = at_bytes - continued[at_bytes]
        self.anchors = chars.tolist()
        self.before = before.tolist()

    def _encode(self, start: int, end: int) -> int:
        if end <= start:
            return 0
        piece = self.text[start:end]
        if end - start > _EDGE:
            return len(self.enc.encode_ordinary(piece))
        # Edges are mostly a word or a few punctuation marks, and they repeat.
        n = self._edges.get(piece)
        if n is None:
            n = self._edges[piece] = len(self.enc.encode_ordinary(piece))
        return n

    def count(self, start: int, end: int) -> int:
        """Tokens of text[start:end] as encode_ordinary counts them."""
        if end - start < _SHORT or not self.anchors:
            return self._encode(start, end)
        i = bisect.bisect_left(self.anchors, start)
        j = bisect.bisect_right(self.anchors, end) - 1
        if i >= len(self.anchors) or j < 0 or self.anchors[i] >= self.anchors[j]:
            return self._encode(start, end)
        a, b = self.anchors[i], self.anchors[j]
        return self._encode(start, a) + self.before[j] - self.before[i] + self._encode(b, end)
