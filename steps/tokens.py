"""Count each chunk's tokens in one or more tiktoken encodings.

Counting uses encode_ordinary: a document that contains the text "<|endoftext|>" is
talking about that string, not asking to end the text, so it is counted as the
ordinary characters it is made of -- which is also what an index receives when the
chunk is sent as plain text. (tiktoken's `encode` would raise on it by default, or,
if allowed, count it as one control token.)
"""

from __future__ import annotations

from dataclasses import replace

from pydantic import Field, field_validator

from .spec import StepParams, StepSpec
from .units import Chunk


class TokensParams(StepParams):
    # The first encoding is the chunk's main count (token_count / encoding).
    encodings: list[str] = Field(default_factory=lambda: ["cl100k_base"], min_length=1)

    @field_validator("encodings")
    @classmethod
    def _distinct(cls, names: list[str]) -> list[str]:
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"encodings listed more than once: {', '.join(repeated)}")
        return names


def count_tokens(chunks: list[Chunk], params: TokensParams, ctx) -> list[Chunk]:
    """Chunk step: token counts per encoding; the first is the chunk's token_count."""
    if ctx is None or ctx.encoding is None:
        raise RuntimeError("tokens needs ctx.encoding to load the token encodings")
    encodings = [(name, ctx.encoding(name)) for name in params.encodings]
    out = []
    for chunk in chunks:
        counts = {name: chunk.token_count
                  if chunk.token_count is not None and chunk.encoding == name
                  else len(enc.encode_ordinary(chunk.text))
                  for name, enc in encodings}
        first = params.encodings[0]
        out.append(replace(
            chunk,
            token_count=counts[first],
            encoding=first,
            parents=[chunk.locator],
            heading_path=list(chunk.heading_path),
            warnings=[],
            payload={"token_counts": counts},
        ))
    return out


TOKENS = StepSpec(
    name="tokens",
    version="1",
    consumes="chunks",
    produces="chunks",
    scope="document",
    params=TokensParams,
    run=count_tokens,
    summary="token counts per encoding (encode_ordinary)",
    encoding_params=("encodings",),
)
