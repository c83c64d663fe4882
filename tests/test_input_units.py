"""A step's input units are the same whether they come straight from the step before,
in the same warm worker, or are read back from the store after a corpus step: the
unit's own columns, and no payload of the stage before (flows/segment.py,
flows/inputs.py read_units, rows.row_to_chunk)."""

from __future__ import annotations

import yaml

from tests.test_worker_sketch import _processed
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.corpus import run_corpus_step
from thresher.flows.execute import BatchJob, BatchRunner, DocJob, load_units


def _definition():
    """The default chain without boilerplate and tokens, with a step that hands chunks on
    unchanged right after personal (same segment) and another right after dedup."""
    data = yaml.safe_load(default_config_text())
    steps = [s for s in data["steps"] if s["step"] not in ("boilerplate", "tokens")]
    at = [s["step"] for s in steps].index("dedup")
    steps.insert(at, {"step": "example_steps:PASS_ALONG"})
    steps.append({"step": "example_steps:PASS_ALONG_LATER"})
    data["steps"] = steps
    return build_definition(data, "test")


def test_input_units_carry_no_payload_of_the_stage_before_on_either_path(tmp_path):
    definition, store, dedup, live, _ = _processed(tmp_path, definition=_definition())
    later = [s.name for s in definition.steps].index("pass_along_later")
    run_corpus_step(definition, store, "r1", dedup, live, set(live))
    after = [DocJob(d, path, str(tmp_path / path), 0, 0.0, later, False) for d, (_, path, _) in live.items()]
    BatchRunner(definition, store, "r1").run(BatchJob("r1", store.root, [later], "b1", after))

    # A step that hands its inputs on writes no notes, on both paths: personal's payload
    # (its finding counts) does not leak into the next stage as notes.
    for stage in ("pass_along", "pass_along_later"):
        rows = store.current(stage, "chunks", include_run="r1").to_pylist()
        assert len(rows) >= 3 and all(r["status"] == "ok" for r in rows), stage
        assert [r["notes"] for r in rows] == [[] for _ in rows], stage

    # Read back as the next step's inputs: the unit's own columns, no payload, the same
    # chunks the stage holds (dedup's signatures and decisions are not the next step's).
    loaded = load_units(store, definition, later, sorted(live), "r1")
    stored = {r["chunk_id"]: r for r in store.current("dedup", "chunks", include_run="r1").to_pylist()
              if r["status"] == "ok"}
    units = [u for got in loaded.values() for u in got.units]
    assert {u.chunk_id for u in units} == set(stored)
    for u in units:
        assert u.payload == {}
        row = stored[u.chunk_id]
        assert (u.text, u.heading_path, u.token_count, u.language) == \
            (row["text"], row["heading_path"], row["token_count"], row["language"])


def test_a_stored_unit_read_back_as_an_input_keeps_every_field_a_step_sees(tmp_path):
    """Reading a stage back takes only the columns an input unit is made from
    (schema.unit_columns): every field a step receives must still come back, for pages
    and chunks, with nulls and empty values as stored."""
    from dataclasses import fields, replace
    from datetime import datetime, timezone

    from thresher.flows.inputs import Stage, read_units
    from thresher.flows.rows import RowContext, rows_to_table, to_row
    from thresher.flows.store import Store
    from thresher.steps.units import Block, Chunk, Page

    store = Store(tmp_path / "store")
    page = Page(locator="page/2", page=2, title="Annual plan", format="pdf", language="de", language_prob=0.97,
                blocks=[Block("heading", "Plan", 1, "de", 0.9), Block("paragraph", "Text hier.", 0, None, None)],
                warnings=["a running header was removed"], parents=["page/2"], payload={"chars_removed": 3})
    bare = Page(locator="file", blocks=[Block("paragraph", "x")])
    chunk = Chunk(locator="chunk/0003", index=3, text="| a | b |\n| 1 | 2 |", heading_path=["Plan", "Costs"],
                  page_start=2, page_end=3, char_start=40, char_end=52, prefix_chars=10, title="Annual plan",
                  format="pdf", language="de", language_prob=0.88, token_count=17, encoding="cl100k_base",
                  chunk_id="c" * 32, warnings=["cut inside a table"], parents=["page/2"])
    started = datetime(2026, 12, 5, 6, 0, tzinfo=timezone.utc)
    for stage, kind, units in (("clean", "pages", [page, bare]), ("split", "chunks", [chunk])):
        ctx = RowContext("r1", "d1", "plan.pdf", stage, "1", "digest", kind, "before", started, 2.5, {})
        table = rows_to_table(stage, kind, [to_row(ctx, u) for u in units])
        store.write_stage_part(stage, "r1", "b0", table, [("d1", "document")])
        got = read_units(store, [Stage(stage, kind, False)], ["d1"], "r1")["d1"]
        assert got.stage == stage
        # An input unit has no lineage, payload or time of the stage it came from.
        expected = [replace(u, parents=[], payload={}, duration_ms=None) for u in units]
        by_locator = {u.locator: u for u in got.units}
        for want in expected:
            have = by_locator[want.locator]
            for f in fields(want):
                assert getattr(have, f.name) == getattr(want, f.name), (stage, want.locator, f.name)
