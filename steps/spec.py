"""What a step is: its name, version, the units it takes and gives, its parameters.

A flow definition names steps; the flows layer looks each name up (built-in name or
a dotted path "package.module:ATTRIBUTE" to a StepSpec) and calls `run`.

Calling conventions, by (consumes, scope):
  source, document  run(source: Source, params, ctx) -> list[Page]
  pages,  document  run(pages: list[Page], params, ctx) -> list[Page]        (page step)
                    run(pages: list[Page], params, ctx) -> list[Chunk]       (when produces="chunks")
  chunks, document  run(chunks: list[Chunk], params, ctx) -> list[Chunk]
  chunks, corpus    run(docs: list[DocChunks], params, ctx) -> list[Chunk]
  pages,  corpus    run(docs: list[DocPages], params, ctx) -> list[DocPages]
  chunks, corpus    an IncrementalCorpusSpec (steps/incremental.py): sketch(docs, params,
                    ctx) -> pa.Table for changed documents only, then decide(table,
                    params, ctx) -> pa.Table over every live chunk's stored sketch
  pages,  corpus    an IncrementalPageSpec (same module): sketch changed pages, decide
                    over stored sketches of the group's pages, apply(doc, decisions,
                    params, ctx) -> DocPages for the pages whose decision is new

A step with `formats` set applies only to documents of those formats (as extraction
detected them); other documents pass it by unchanged and it writes no rows for them.

A document-scope step receives only the units that are ok upstream, in document
order. It returns one unit per unit it decided about; a unit it cannot handle is
returned with status failed and a reason rather than raising. If it raises anyway,
the flows layer records every unit of that document as failed with the traceback.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Literal

from pydantic import BaseModel, ConfigDict


class StepParams(BaseModel):
    """Base of every step's parameter model: unknown keys are errors, not ignored."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class NoParams(StepParams):
    pass


Consumes = Literal["source", "pages", "chunks"]
Produces = Literal["pages", "chunks"]
Scope = Literal["document", "corpus"]


@dataclass
class StepContext:
    """What the flows layer hands a step besides its units and parameters.

    `encoding(name)` returns a ready tiktoken Encoding (loaded offline by flows).
    """

    doc_id: str = ""
    source_path: str = ""
    encoding: Callable[[str], Any] | None = None
    extras: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StepSpec:
    name: str
    version: str
    consumes: Consumes
    produces: Produces
    scope: Scope
    params: type[StepParams]
    run: Callable[..., list]
    summary: str = ""
    # Names of the params fields that hold tiktoken encoding names, so the flows layer
    # can load those encodings before the step runs.
    encoding_params: tuple[str, ...] = ()
    # For a step that reads source files: the most bytes it will accept, given its
    # parameters. The flows layer does not read a larger file into memory at all; it
    # hands the step an empty Source carrying the file's size, and the step says why.
    source_limit: Callable[[StepParams], int | None] | None = None
    # The longest one document may take in this step, given its parameters. The flows
    # layer runs such a step in a child process and kills it at the limit.
    time_limit: Callable[[StepParams], float | None] | None = None
    formats: tuple[str, ...] = ()
    # For a plain or incremental-page corpus step whose decisions about a document depend only on the
    # documents of its group (the boilerplate step's site folder): the group of a
    # document, from its live path and the parameters. A run then loads only the
    # groups that hold a document added, changed, moved or removed.
    group: Callable[[str, StepParams], str] | None = None
