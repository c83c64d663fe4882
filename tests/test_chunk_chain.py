"""clean -> language -> split -> tokens on the demo drive, called as plain steps.

Checks what holds across the steps on real extraction output: the split step and the
tokens step agree on every chunk's count in the split budget's encoding, every chunk
fits the budget, chunk texts are exact slices of the cleaned pages, and chunk
languages come from the blocks the language step judged.
"""

from __future__ import annotations

import pytest

from conftest import SAMPLE
from thresher.flows.encodings import get_encoding
from thresher.steps.clean import CleanParams, clean
from thresher.steps.extract import EXTRACT, ExtractParams
from thresher.steps.language import LanguageParams, detect_language
from thresher.steps.spec import StepContext
from thresher.steps.split import SplitParams, split
from thresher.steps.tokens import TokensParams, count_tokens
from thresher.steps.units import BLOCK_SEP, Source
from test_tokens import lookup

BUDGETS = [SplitParams(), SplitParams(max_tokens=60, overlap_tokens=10),
           SplitParams(max_tokens=200, encoding="bytes_only", merge_below_tokens=0)]


@pytest.fixture(scope="module")
def drive_pages():
    """Per demo file that extracts, its cleaned and language-tagged pages."""
    out = {}
    for path in sorted(p for p in SAMPLE.rglob("*") if p.is_file()):
        rel = path.relative_to(SAMPLE).as_posix()
        data = path.read_bytes()
        ctx = StepContext(doc_id=rel, source_path=rel, encoding=lookup)
        pages = [p for p in EXTRACT.run(Source(rel, rel, data, len(data), 0.0), ExtractParams(), ctx)
                 if p.ok]
        pages = [p for p in clean(pages, CleanParams()) if p.ok]
        pages = [p for p in detect_language(pages, LanguageParams()) if p.ok]
        if pages:
            out[rel] = pages
    assert len(out) >= 10, sorted(out)
    return out


@pytest.mark.parametrize("params", BUDGETS, ids=["default", "60-overlap", "bytes"])
def test_split_and_tokens_agree_on_every_chunk(drive_pages, params):
    ctx = StepContext(encoding=lookup)
    tokens = TokensParams(encodings=[params.encoding] + [e for e in ("cl100k_base", "bytes_only")
                                                         if e != params.encoding])
    total = 0
    for rel, pages in drive_pages.items():
        chunks = split(pages, params, ctx)
        counted = count_tokens(chunks, tokens, ctx)
        for chunk, after in zip(chunks, counted, strict=True):
            assert chunk.ok, (rel, chunk.reason)
            assert chunk.token_count <= params.max_tokens
            # The same number, from two steps, in the split budget's encoding.
            assert after.payload["token_counts"][params.encoding] == chunk.token_count, rel
            assert after.token_count == chunk.token_count and after.encoding == params.encoding
            assert after.payload["token_counts"]["bytes_only"] == len(chunk.text.encode("utf-8"))
            total += 1
    assert total > 30


def test_chunks_are_slices_of_the_cleaned_pages(drive_pages):
    for rel, pages in drive_pages.items():
        doc = BLOCK_SEP.join(p.text for p in pages)
        starts = {p.page: sum(len(q.text) + 2 for q in pages[:i]) for i, p in enumerate(pages)}
        for chunk in split(pages, SplitParams(), StepContext(encoding=get_encoding)):
            start = starts[chunk.page_start] + chunk.char_start
            end = starts[chunk.page_end] + chunk.char_end
            assert chunk.text[chunk.prefix_chars:] == doc[start:end], rel


def test_languages_of_the_demo_drive(drive_pages):
    by_file = {}
    for rel, pages in drive_pages.items():
        chunks = split(pages, SplitParams(), StepContext(encoding=get_encoding))
        by_file[rel] = {c.language for c in chunks}
        # Blocks long enough were judged; a chunk's language is one of its blocks' or pages'.
        judged = {b.language for p in pages for b in p.blocks if b.language} | {p.language for p in pages}
        assert by_file[rel] <= judged | {"unknown"}, rel
    languages = set().union(*by_file.values())
    assert {"en", "de", "fr"} <= languages, by_file
