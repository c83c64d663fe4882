"""Between step units (steps.units) and stage-table rows (flows.schema).

Here unit ids and lineage are made: a unit's id is a hash of (doc_id, step,
locator), its parents' ids are the same hash at the previous stage.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache
from typing import Any

import pyarrow as pa

from thresher.flows import schema
from thresher.steps.units import Block, Chunk, Page


def unit_id(doc_id: str, step: str, locator: str) -> str:
    return hashlib.sha256(f"{doc_id}\x1f{step}\x1f{locator}".encode()).hexdigest()[:32]


@dataclass
class RowContext:
    """What every row of one document at one stage shares."""

    run_id: str
    doc_id: str
    source_path: str
    step: str
    step_version: str
    config_digest: str
    unit: str  # "pages" | "chunks"
    prev_step: str | None
    started_at: datetime
    document_ms: float | None  # the step's time for this whole document (first row only)
    attempts: dict[str, int]  # unit_id -> highest attempt already stored


@lru_cache(maxsize=None)
def _payload_names(stage: str, unit: str) -> tuple[bool, tuple[str, ...], frozenset[str]]:
    """(the payload goes to `notes`, the payload column names, the same as a set), once
    per stage: worked out for every row, the names were most of a row's payload time
    (py-spy on a run's parent: 0.10 of its 0.75 s holding the interpreter lock)."""
    fields = schema.payload_fields(stage, unit)
    notes = len(fields) == 1 and fields[0].name == "notes" and stage not in schema.STAGE_PAYLOAD
    names = tuple(f.name for f in fields)
    return notes, names, frozenset(names)


def _payload(stage: str, unit: str, payload: dict[str, Any]) -> dict[str, Any]:
    notes, names, known = _payload_names(stage, unit)
    if notes:
        return {"notes": {str(k): str(v) for k, v in payload.items()}}
    if not known.issuperset(payload):
        raise ValueError(
            f"step {stage} returned payload keys {sorted(set(payload) - known)} that its stage table has no "
            f"column for (columns: {sorted(known)})"
        )
    return {name: payload.get(name) for name in names}


def _common(ctx: RowContext, unit: Page | Chunk) -> dict[str, Any]:
    uid = unit_id(ctx.doc_id, ctx.step, unit.locator)
    parents = [unit_id(ctx.doc_id, ctx.prev_step, p) for p in unit.parents] if ctx.prev_step else []
    return {
        "run_id": ctx.run_id,
        "doc_id": ctx.doc_id,
        "source_path": ctx.source_path,
        "unit_id": uid,
        "parent_ids": parents,
        "locator": unit.locator,
        "step": ctx.step,
        "step_version": ctx.step_version,
        "config_digest": ctx.config_digest,
        "status": unit.status,
        "reason": unit.reason or None,
        "error_type": unit.error_type or None,
        "traceback": unit.traceback or None,
        "attempt": ctx.attempts.get(uid, 0) + 1,
        "started_at": ctx.started_at,
        "duration_ms": unit.duration_ms,
        "document_ms": ctx.document_ms,
        "warnings": list(unit.warnings),
    }


def page_row(ctx: RowContext, page: Page) -> dict[str, Any]:
    row = _common(ctx, page)
    row.update(
        page=page.page,
        text=page.text,
        blocks=[{"kind": b.kind, "level": b.level, "text": b.text, "language": b.language,
                 "language_prob": b.language_prob} for b in page.blocks],
        title=page.title,
        format=page.format,
        language=page.language,
        language_prob=page.language_prob,
    )
    row.update(_payload(ctx.step, "pages", page.payload))
    return row


def chunk_row(ctx: RowContext, chunk: Chunk) -> dict[str, Any]:
    row = _common(ctx, chunk)
    chunk_id = chunk.chunk_id or row["unit_id"]  # born here: the split stage names it
    row.update(
        page=chunk.page_start,
        chunk_id=chunk_id,
        chunk_index=chunk.index,
        text=chunk.text,
        heading_path=list(chunk.heading_path),
        page_start=chunk.page_start,
        page_end=chunk.page_end,
        char_start=chunk.char_start,
        char_end=chunk.char_end,
        prefix_chars=chunk.prefix_chars,
        title=chunk.title,
        format=chunk.format,
        language=chunk.language,
        language_prob=chunk.language_prob,
        token_count=chunk.token_count,
        encoding=chunk.encoding,
    )
    row.update(_payload(ctx.step, "chunks", chunk.payload))
    return row


def to_row(ctx: RowContext, unit: Page | Chunk) -> dict[str, Any]:
    return page_row(ctx, unit) if ctx.unit == "pages" else chunk_row(ctx, unit)


def rows_to_table(stage: str, unit: str, rows: list[dict[str, Any]]) -> pa.Table:
    # Column by column: the same table as Table.from_pylist (a key a row lacks is null),
    # which took 1.2-1.9x as long on chunk rows (their maps and lists; demo stages x20).
    sch = schema.stage_schema(stage, unit)
    return pa.Table.from_pydict({name: [r.get(name) for r in rows] for name in sch.names}, schema=sch)


def _outcome(row: dict[str, Any]) -> dict[str, Any]:
    return {
        "status": row["status"],
        "reason": row.get("reason") or "",
        "error_type": row.get("error_type") or "",
        "traceback": row.get("traceback") or "",
        "warnings": list(row.get("warnings") or []),
    }


def row_to_page(row: dict[str, Any]) -> Page:
    """A stored page row as the next step's input unit (its locator is kept). An input
    unit carries no payload: a stage's payload columns are the step's that wrote them
    (steps.units), and no step reads another's (inputs.read_units leaves them unread)."""
    return Page(
        locator=row["locator"],
        page=row.get("page"),
        blocks=[Block(kind=b["kind"], text=b["text"], level=int(b["level"] or 0),
                      language=b.get("language"), language_prob=b.get("language_prob"))
                for b in row.get("blocks") or []],
        title=row.get("title") or "",
        format=row.get("format") or "",
        language=row.get("language"),
        language_prob=row.get("language_prob"),
        parents=[],
        payload={},
        **_outcome(row),
    )


def row_to_chunk(row: dict[str, Any]) -> Chunk:
    return Chunk(
        locator=row["locator"],
        index=int(row.get("chunk_index") or 0),
        text=row.get("text") or "",
        heading_path=list(row.get("heading_path") or []),
        page_start=row.get("page_start"),
        page_end=row.get("page_end"),
        char_start=int(row.get("char_start") or 0),
        char_end=int(row.get("char_end") or 0),
        prefix_chars=int(row.get("prefix_chars") or 0),
        title=row.get("title") or "",
        format=row.get("format") or "",
        language=row.get("language"),
        language_prob=row.get("language_prob"),
        token_count=row.get("token_count"),
        encoding=row.get("encoding"),
        chunk_id=row.get("chunk_id") or "",
        parents=[],
        payload={},
        **_outcome(row),
    )


def row_to_unit(unit: str, row: dict[str, Any]) -> Page | Chunk:
    return row_to_page(row) if unit == "pages" else row_to_chunk(row)
