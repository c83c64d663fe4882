"""A unit's payload becomes its stage row's payload columns (flows/rows.py): a built-in
stage takes the columns schema.STAGE_PAYLOAD declares and refuses any other key; a
stage of your own keeps the payload as `notes`."""

from __future__ import annotations

from datetime import datetime, timezone

import pytest

from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.steps.units import Chunk


def _ctx(step: str) -> RowContext:
    return RowContext("r1", "doc", "a.md", step, "1", "digest", "chunks", "split",
                      datetime(2026, 12, 4, tzinfo=timezone.utc), 1.5, {})


def _chunk(payload: dict) -> Chunk:
    return Chunk(locator="c0", text="Opening hours", chunk_id="c0", parents=["c0"], payload=payload)


def test_a_built_in_stage_takes_its_declared_payload_columns():
    row = to_row(_ctx("tokens"), _chunk({"token_counts": {"cl100k_base": 3}}))
    table = rows_to_table("tokens", "chunks", [row])
    assert table.column("token_counts").to_pylist() == [[("cl100k_base", 3)]]
    # A declared column the step left out is null, not missing.
    row = to_row(_ctx("dedup"), _chunk({"content_hash": "ab"}))
    assert row["content_hash"] == "ab" and row["duplicate_of"] is None and row["signature"] is None


def test_a_payload_key_with_no_column_fails_with_the_keys_named():
    with pytest.raises(ValueError, match=r"step tokens returned payload keys \['colour'\].*token_counts"):
        to_row(_ctx("tokens"), _chunk({"token_counts": {}, "colour": "red"}))


def test_a_stage_of_your_own_keeps_the_payload_as_notes():
    row = to_row(_ctx("shout_rota"), _chunk({"masked": 2, "who": "rota"}))
    assert row["notes"] == {"masked": "2", "who": "rota"}
