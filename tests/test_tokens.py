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

