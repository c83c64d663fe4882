"""Find chunks whose text is the same across the whole corpus (exact duplicates).

Two chunks are duplicates when their texts are equal after normalisation: Unicode
NFKC, case folding (str.casefold, which also folds German sharp s), removal of
punctuation (Unicode categories P*), and collapsing whitespace runs to one space.
Each fold can be switched off. The SHA-256 of the normalised text is the chunk's
content hash. A chunk whose text is nothing but punctuation would normalise to the
empty string and match every other such chunk, so for those the punctuation is kept.

Of a group of duplicates the canonical chunk is the one from the document with the
lowest rank (the flows layer ranks documents by when they were first seen, then by
path), then the lowest chunk index; the others are dropped with a reason naming it.
Near-duplicates (MinHash) are a later issue.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from dataclasses import replace

from .spec import StepParams, StepSpec
from .units import Chunk, DocChunks

_WHITESPACE = re.compile(r"\s+")


class DedupParams(StepParams):
    fold_case: bool = True
    fold_punctuation: bool = True
    fold_whitespace: bool = True
    fold_unicode: bool = True  # NFKC


def _drop_punctuation(text: str) -> str:
    return "".join(ch for ch in text if not unicodedata.category(ch).startswith("P"))


def normalise(text: str, params: DedupParams) -> str:
    """The text two chunks must share to count as exact duplicates."""
    if params.fold_unicode:
        text = unicodedata.normalize("NFKC", text)
    if params.fold_case:
        text = text.casefold()
    if params.fold_punctuation:
        without = _drop_punctuation(text)
        if without.strip():
            text = without
    if params.fold_whitespace:
        text = _WHITESPACE.sub(" ", text).strip()
    return text


def content_hash(text: str, params: DedupParams) -> str:
    return hashlib.sha256(normalise(text, params).encode("utf-8")).hexdigest()


def _folds_in_words(params: DedupParams) -> str:
    folds = [name for name, on in (("case", params.fold_case),
                                   ("whitespace", params.fold_whitespace),
                                   ("punctuation", params.fold_punctuation)) if on]
    if params.fold_unicode:
        base = "same text after NFKC normalisation"
        if folds:
            base += " and folding " + _and_list(folds)
    elif folds:
        base = "same text after folding " + _and_list(folds)
    else:
        base = "identical text"
    return base


def _and_list(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def deduplicate(docs: list[DocChunks], params: DedupParams, ctx=None) -> list[Chunk]:
    """Corpus step: every input chunk back, duplicates dropped with their canonical named."""
    # Candidates in canonical order: document rank (ties by path, then doc id), chunk index.
    ordered = sorted(
        ((doc, chunk) for doc in docs for chunk in doc.chunks),
        key=lambda dc: (dc[0].rank, dc[0].source_path, dc[0].doc_id, dc[1].index),
    )
    hashes: dict[int, str] = {}
    canonical: dict[str, tuple[DocChunks, Chunk]] = {}
    for doc, chunk in ordered:
        h = content_hash(chunk.text, params)
        hashes[id(chunk)] = h
        if chunk.ok and h not in canonical:
            canonical[h] = (doc, chunk)

    how = _folds_in_words(params)
    out: list[Chunk] = []
    for doc in docs:
        for chunk in doc.chunks:
            h = hashes[id(chunk)]
            new = replace(chunk, parents=[chunk.locator], warnings=[],
                          payload={"content_hash": h, "duplicate_of": None, "similarity": None},
                          heading_path=list(chunk.heading_path))
            if chunk.ok:
                first_doc, first = canonical[h]
                if first is not chunk:
                    new.payload["duplicate_of"] = first.chunk_id
                    new.payload["similarity"] = 1.0
                    new.drop(f"exact duplicate of chunk {first.chunk_id} in "
                             f"{first_doc.source_path} ({how})")
            out.append(new)
    return out


DEDUP = StepSpec(
    name="dedup",
    version="1",
    consumes="chunks",
    produces="chunks",
    scope="corpus",
    params=DedupParams,
    run=deduplicate,
    summary="drop exact duplicate chunks across the corpus (normalised text hash)",
)
