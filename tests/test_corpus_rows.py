"""The rows an incremental corpus step writes for a rewritten document, made in Arrow
(corpus._fresh_rows), against the row model's own construction (rows.chunk_row of each
input chunk as the step's unit), nulls and both outcomes included."""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime, timezone

import pyarrow as pa

from tests.test_worker_sketch import _processed
from thresher.flows import schema
from thresher.flows.corpus import _fresh_rows, _positions, _read_inputs
from thresher.flows.rows import RowContext, row_to_chunk, rows_to_table, to_row
from thresher.steps.dedup import DECISIONS
from thresher.steps.units import OK


def _with_nulls(inputs: pa.Table) -> pa.Table:
    """The first row with the columns a stored row may leave empty set to null or ""."""
    for name in ("title", "format", "heading_path", "chunk_index", "char_start", "prefix_chars", "text"):
        values = inputs.column(name).to_pylist()
        values[0] = None
        inputs = inputs.set_column(inputs.column_names.index(name), name, pa.array(values, inputs.schema.field(name).type))
    ids = inputs.column("chunk_id").to_pylist()
    ids[1] = ""
    return inputs.set_column(inputs.column_names.index("chunk_id"), "chunk_id", pa.array(ids, pa.string()))


def test_rows_made_in_arrow_are_the_row_models_rows_of_the_steps_units(tmp_path):
    definition, store, dedup, live, result = _processed(tmp_path)
    step = definition.steps[dedup]
    inputs = _read_inputs(store, definition, dedup, sorted(live), "r1")
    before = definition.steps[dedup - 1].name  # the stage the inputs were read from
    inputs = _with_nulls(inputs)
    sketch = result.sketches[dedup]
    ids = inputs.column("chunk_id").to_pylist()
    sketch_ids = sketch.column("chunk_id").to_pylist()
    sketch = sketch.set_column(sketch.column_names.index("chunk_id"), "chunk_id",
                               pa.array([ids[1] if c not in ids else c for c in sketch_ids], pa.string()))
    docs = inputs.column("doc_id").to_pylist()
    # Invented decisions: one chunk kept, one set aside with a reason, one with an empty one.
    n = inputs.num_rows
    status = [OK, "dropped", "dropped"] + [OK] * (n - 3)
    reason = [None, "exact duplicate of chunk x", ""] + [None] * (n - 3)
    decisions = pa.table({"doc_id": docs, "chunk_id": ids, "status": status, "reason": reason,
                          "duplicate_of": [None, "x", "y"] + [None] * (n - 3),
                          "duplicate_kind": [None, "exact", "near"] + [None] * (n - 3),
                          "similarity": [None, 1.0, 0.85] + [None] * (n - 3)}, schema=DECISIONS)
    started = datetime(2026, 12, 4, 9, 30, tzinfo=timezone.utc)
    attempts = {}
    made = _fresh_rows(step, inputs, sketch, _positions(sketch), decisions, _positions(decisions), live,
                       attempts, {"run_id": "r2", "started_at": started})

    sk = {(r["doc_id"], r["chunk_id"]): r for r in sketch.to_pylist()}
    dec = {(r["doc_id"], r["chunk_id"]): r for r in decisions.to_pylist()}
    rows = []
    for row in inputs.to_pylist():
        chunk = row_to_chunk(row)
        key = (row["doc_id"], chunk.chunk_id)
        payload = {c: sk[key][c] for c in step.spec.sketch_columns}
        payload.update({c: dec[key][c] for c in step.spec.decision_columns})
        unit = replace(chunk, parents=[chunk.locator], warnings=[], payload=payload, status=OK, reason="")
        if dec[key]["status"] != OK:
            unit.status, unit.reason = dec[key]["status"], dec[key]["reason"] or ""
        ctx = RowContext("r2", row["doc_id"], live[row["doc_id"]][1], step.name, step.spec.version, step.digest,
                         "chunks", before, started, None, attempts)
        rows.append(to_row(ctx, unit))
    expected = rows_to_table(step.name, "chunks", rows)
    assert made.schema.equals(schema.stage_schema(step.name, "chunks"))
    for name in expected.column_names:
        assert made.column(name).equals(expected.column(name)), name
    assert made.column("reason").to_pylist()[:3] == [None, "exact duplicate of chunk x", None]
