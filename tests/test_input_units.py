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
