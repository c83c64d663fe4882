"""A corpus-wide chunk step that keeps its own per-chunk state in its stage table.

A plain corpus step (steps/spec.py) sees the full chunks of every live document on
every run. That does not scale to a drive whose chunks do not fit in memory, and it
redoes work for documents that did not change. An incremental corpus step splits its
work in two pure functions instead:

  sketch(docs: list[DocChunks], params, ctx) -> pyarrow.Table
      Called only for documents whose input changed this run (in batches of
      documents, so a batch's text can be let go once sketched). Returns one row per
      input chunk: doc_id, chunk_id, chunk_index and the `sketch_columns`. A sketch
      depends on one document alone, never on the rest of the corpus, and reads only
      its doc_id and chunks (not rank, source_path or modified): the flows make it in
      the warm worker that has just made the chunks, one document at a time, when the
      step comes right after a document segment, and sketch only what that missed.

  decide(table: pyarrow.Table, params, ctx) -> pyarrow.Table
      Called once per run with one row per chunk of every live document: the
      sketches of this run's documents (column fresh = true) and, for documents that
      did not change, the step's own stored rows (fresh = false), which carry
      status, reason, the sketch columns and the decision columns as stored. No text
      of unchanged chunks is read. The flows layer adds rank and source_path (the
      document's current rank and path; lower rank wins deterministic choices).
      Returns decisions: doc_id, chunk_id, status, reason and the
      `decision_columns`, for every fresh chunk and for each stored chunk whose
      decision changed (for instance a duplicate whose canonical chunk's document
      was deleted). Stored chunks it does not mention keep their rows.

The flows layer turns decisions into stage-table rows: a fresh chunk's row is its
input chunk with the sketch and decision columns as payload; a stored chunk's row is
its stored row with the new decision applied. Both function signatures are pure:
tables in, tables out, no store, no files.

`run` keeps the plain convention, run(docs, params, ctx) -> list[Chunk], for
callers without a store: it must give the same decisions as sketch + decide over
the same documents.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import pyarrow as pa

from .spec import StepSpec


@dataclass(frozen=True)
class IncrementalCorpusSpec(StepSpec):
    sketch: Callable[..., pa.Table] | None = None
    decide: Callable[..., pa.Table] | None = None
    # Payload columns the sketch gives and the decision gives; both are stored in the
    # step's stage table and handed back for chunks of unchanged documents.
    sketch_columns: tuple[str, ...] = ()
    decision_columns: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.scope != "corpus" or self.consumes != "chunks" or self.produces != "chunks":
            raise ValueError(f"step {self.name}: an incremental corpus step takes and gives chunks, corpus-wide")
        if self.sketch is None or self.decide is None:
            raise ValueError(f"step {self.name}: an incremental corpus step needs both sketch and decide")

    @property
    def kept_columns(self) -> tuple[str, ...]:
        """Columns of the stored rows handed back to `decide` for unchanged documents."""
        return ("doc_id", "chunk_id", "chunk_index", "status", "reason") + self.sketch_columns + \
            self.decision_columns


@dataclass(frozen=True)
class IncrementalPageSpec(StepSpec):
    """A corpus-wide page step that keeps per-page state in its stage table.

    The page form of IncrementalCorpusSpec, for a step whose decision changes a
    page's text (so a stored row cannot simply take a new status, as a chunk's can:
    the page must be made again from its input). Three pure functions:

      sketch(docs: list[DocPages], params, ctx) -> pyarrow.Table
          For pages whose input changed this run only: doc_id, locator and the
          `sketch_columns`; depends on one page alone.

      decide(table: pyarrow.Table, params, ctx) -> pyarrow.Table
          One row per live page of the groups concerned (StepSpec.group; all pages
          without one): doc_id, locator, source_path (the live path), fresh, the
          sketch columns, and the decision columns (as stored; null for fresh pages).
          Returns doc_id, locator and the decision columns for every fresh page and
          for each stored page whose decision changed.

      apply(doc: DocPages, decisions: dict[locator, dict], params, ctx) -> DocPages
          The document's pages made from their inputs and their decisions (a dict of
          the decision columns per locator); each page's payload carries the sketch
          and decision columns, so the next run reads them back.

    The flows layer reads the input pages in full only for fresh pages and for
    stored pages whose decision changed. `run` keeps the plain convention and must
    give what sketch, decide and apply give over the same documents.
    """

    sketch: Callable[..., pa.Table] | None = None
    decide: Callable[..., pa.Table] | None = None
    apply: Callable[..., Any] | None = None
    # describe(table, params, ctx) -> list[str]: optional lines for the run's log about
    # the groups decided (what counts over a group, which no page's row should carry).
    describe: Callable[..., list[str]] | None = None
    sketch_columns: tuple[str, ...] = ()
    decision_columns: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.scope != "corpus" or self.consumes != "pages" or self.produces != "pages":
            raise ValueError(f"step {self.name}: an incremental page step takes and gives pages, corpus-wide")
        if self.sketch is None or self.decide is None or self.apply is None:
            raise ValueError(f"step {self.name}: an incremental page step needs sketch, decide and apply")

    @property
    def kept_columns(self) -> tuple[str, ...]:
        """Columns of the stored rows read back (no text) for pages that did not change."""
        return ("doc_id", "locator", "status") + self.sketch_columns + self.decision_columns
