"""Slice counts read off one encoding of the whole text (steps/token_offsets.py) must be
exactly what tiktoken's encode_ordinary gives for the slice on its own (the reference)."""

from __future__ import annotations

import gzip
import random
from pathlib import Path

import pytest

from thresher.flows.encodings import get_encoding
from thresher.steps import token_offsets
from thresher.steps.token_offsets import SliceCounter

ENC = get_encoding("cl100k_base")

# Real texts Debian ships: licences (English prose, hard-wrapped), German and French
# manual pages (troff source: accents, markup, numbers) and the Unicode block list.
TEXTS = [Path("/usr/share/common-licenses/GPL-3"), Path("/usr/share/common-licenses/Apache-2.0"),
         Path("/usr/share/unicode/Blocks.txt")]
MAN = sorted(Path("/usr/share/man/de/man1").glob("*.gz"))[:8] + sorted(Path("/usr/share/man/fr/man1").glob("*.gz"))[:8]


def _texts() -> list[str]:
    out = [p.read_text(encoding="utf-8") for p in TEXTS if p.exists()]
    out += [gzip.decompress(p.read_bytes()).decode("utf-8", "replace") for p in MAN]
    if len(out) < 10:
        pytest.skip("needs base-files' licences, manpages-de/-fr and unicode-data (make system-deps)")
    return out


def test_slice_counts_equal_tiktoken_on_real_texts_at_any_cut():
    rng = random.Random(3)
    checked = used_anchors = 0
    for text in _texts():
        counter = SliceCounter(ENC, text)
        assert counter.anchors, "the whole-text encoding gave no anchors"
        for _ in range(60):
            start = rng.randrange(len(text))
            end = min(len(text), start + rng.choice([5, 60, 400, 3000, 30000]))
            expected = len(ENC.encode_ordinary(text[start:end]))
            assert counter.count(start, end) == expected, (text[start:start + 30], text[end - 30:end])
            checked += 1
        used_anchors += len(counter.anchors)
    assert checked >= 600 and used_anchors > 10_000


def test_slice_counts_equal_tiktoken_where_the_pieces_are_tricky():
    # Contractions, apostrophes, runs of spaces and line breaks, digit groups, marks,
    # CJK, no-break spaces: everything the pre-tokenizer treats specially, mixed at random.
    parts = ["word", "The", "'s", "'", "'ll", "'S", " ", "   ", "\n", "\n\n", "\t", " \n", "1", "1234", ".",
             " .", "!?", "...", "é", "e\u0301", "中文", "\u00a0", "-", "/", "\r\n", "\u2019", "s", "ll", "_"]
    rng = random.Random(5)
    for _ in range(300):
        text = "".join(rng.choice(parts) for _ in range(rng.randint(40, 300)))
        counter = SliceCounter(ENC, text)
        for _ in range(10):
            start = rng.randrange(len(text))
            end = rng.randint(start, len(text))
            assert counter.count(start, end) == len(ENC.encode_ordinary(text[start:end])), text[start:end]


def test_an_encoding_whose_pattern_was_not_checked_is_counted_directly(monkeypatch):
    monkeypatch.setattr(token_offsets, "ANCHOR_ENCODINGS", frozenset())
    text = Path("/usr/share/common-licenses/GPL-3").read_text(encoding="utf-8")
    counter = SliceCounter(ENC, text)
    assert counter.anchors == []
    assert counter.count(100, 5000) == len(ENC.encode_ordinary(text[100:5000]))
