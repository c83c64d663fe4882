"""The tokens step: counts per encoding, first encoding is the chunk's count."""

from __future__ import annotations

import pydantic
import pytest
import tiktoken

from thresher.flows.encodings import get_encoding
from thresher.steps.spec import StepContext
from thresher.steps.tokens import TOKENS, TokensParams, count_tokens
from thresher.steps.units import Chunk, chunk_locator

# A second, real tiktoken Encoding that needs no file: one token per UTF-8 byte.
# (No merges at all, so its counts are checkable by hand: len(text.encode("utf-8")).)
BYTES = tiktoken.Encoding(
    name="bytes_only",
    pat_str=r"(?s:.+)",
    mergeable_ranks={bytes([b]): b for b in range(256)},
    special_tokens={},
)


def lookup(name):
    return BYTES if name == "bytes_only" else get_encoding(name)


CTX = StepContext(doc_id="d1", source_path="a.md", encoding=lookup)


def chunk(i, text):
    return Chunk(locator=chunk_locator(i), index=i, text=text, chunk_id=f"id-{i}",
                 heading_path=["Guide"], page_start=1, page_end=1, char_start=0,
                 char_end=len(text), token_count=999, encoding="stale")


def test_counts_the_cookbook_example():
    # OpenAI Cookbook, "How to count tokens with tiktoken" (examples/
    # How_to_count_tokens_with_tiktoken.ipynb): num_tokens_from_string("tiktoken is
    # great!", "cl100k_base") is 6.
    [out] = count_tokens([chunk(0, "tiktoken is great!")], TokensParams(), CTX)
    assert out.token_count == 6
    assert out.encoding == "cl100k_base"
    assert out.payload == {"token_counts": {"cl100k_base": 6}}


def test_several_encodings_first_one_leads():
    text = "Quillfern members may borrow eight books – größere Mengen nach Absprache."
    params = TokensParams(encodings=["cl100k_base", "bytes_only"])
    [out] = count_tokens([chunk(0, text)], params, CTX)
    expected = len(get_encoding("cl100k_base").encode_ordinary(text))
    assert out.payload["token_counts"] == {"cl100k_base": expected,
                                           "bytes_only": len(text.encode("utf-8"))}
    assert out.token_count == expected and out.encoding == "cl100k_base"

    [swapped] = count_tokens([chunk(0, text)], TokensParams(encodings=["bytes_only",
                                                                       "cl100k_base"]), CTX)
    assert swapped.token_count == len(text.encode("utf-8"))
    assert swapped.encoding == "bytes_only"


def test_special_token_text_counts_as_ordinary_text():
    text = "The end marker <|endoftext|> is just text in this memo."
    enc = get_encoding("cl100k_base")
    [out] = count_tokens([chunk(0, text)], TokensParams(), CTX)
    assert out.token_count == len(enc.encode_ordinary(text))
    # Read as a control token it would be one token; as text it is several.
    assert len(enc.encode("<|endoftext|>", allowed_special="all")) == 1
    assert len(enc.encode_ordinary("<|endoftext|>")) > 1
    assert 100257 not in enc.encode_ordinary(text)


def test_keeps_identity_and_sets_lineage():
    chunks = [chunk(0, "First chunk."), chunk(1, "Second chunk.")]
    chunks[1].warnings.append("from an earlier step")
    out = count_tokens(chunks, TokensParams(), CTX)
    assert [c.chunk_id for c in out] == ["id-0", "id-1"]
    assert [c.parents for c in out] == [["chunk/00000"], ["chunk/00001"]]
    assert [c.text for c in out] == ["First chunk.", "Second chunk."]
    assert all(c.heading_path == ["Guide"] and c.char_end == len(c.text) for c in out)
    assert out[1].warnings == []
    assert chunks[0].token_count == 999  # input not modified


def test_params_are_checked():
    with pytest.raises(pydantic.ValidationError):
        TokensParams(encodings=[])
    with pytest.raises(pydantic.ValidationError, match="more than once"):
        TokensParams(encodings=["cl100k_base", "cl100k_base"])
    with pytest.raises(pydantic.ValidationError):
        TokensParams(encoding="cl100k_base")  # unknown key
    assert TOKENS.encoding_params == ("encodings",)
    assert (TOKENS.name, TOKENS.consumes, TOKENS.produces, TOKENS.scope) == (
        "tokens", "chunks", "chunks", "document")



def test_counts_in_the_hand_off_are_tiktokens_count_of_the_final_text_masked_or_not():
    # Real text: the copyright file Debian's manpages package ships (many e-mail
    # addresses). split counts every chunk and tokens reuses that count; the personal
    # step's mask changes the text after split, so the count must follow the text.
    # The reference is tiktoken's own encode_ordinary of each chunk's final text.
    from pathlib import Path

    from thresher.steps.clean import CleanParams, clean
    from thresher.steps.extract.text import text_blocks
    from thresher.steps.personal import PersonalParams, find_personal
    from thresher.steps.split import SplitParams, split
    from thresher.steps.units import Page

    text = Path("/usr/share/doc/manpages/copyright").read_text(encoding="utf-8")
    pages = clean([Page(locator="file", page=None, blocks=text_blocks(text), format="text")], CleanParams())
    chunks = split(pages, SplitParams(), CTX)
    masked = find_personal(chunks, PersonalParams(policy={"email": "mask"}), CTX)
    out = count_tokens(masked, TokensParams(encodings=["cl100k_base", "bytes_only"]), CTX)
    enc = get_encoding("cl100k_base")
    assert len(out) == len(chunks) > 10
    changed = [i for i, c in enumerate(out) if c.text != chunks[i].text]
    # The mask changed the token count of some chunks (else this test could not fail).
    assert any(len(enc.encode_ordinary(out[i].text)) != chunks[i].token_count for i in changed)
    for c in out:
        assert c.token_count == len(enc.encode_ordinary(c.text)) == c.payload["token_counts"]["cl100k_base"]
        assert c.payload["token_counts"]["bytes_only"] == len(c.text.encode("utf-8"))
    # Chunks the mask left alone kept split's count (the one tokens reuses).
    assert all(out[i].token_count == chunks[i].token_count for i in range(len(out)) if i not in changed)
