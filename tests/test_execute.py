"""The batch runner without Prefect: per-document faults become rows, not crashes."""

from __future__ import annotations

import hashlib

import yaml

from thresher.flows.config import build_definition, default_config_text
from thresher.flows.execute import BatchJob, BatchRunner, DocJob
from thresher.flows.store import Store


def _document_steps(data: dict) -> dict:
    """The default chain without its corpus-wide steps, so one batch runs it through split."""
    data["steps"] = [s for s in data["steps"] if s["step"] not in ("boilerplate", "dedup", "tokens")]
    return data


def _segment(definition) -> list[int]:
    return list(range(len(definition.steps)))


def _definition(max_file_mb: float = 200):
    data = _document_steps(yaml.safe_load(default_config_text()))
    data["steps"][0]["params"]["max_file_mb"] = max_file_mb
    return build_definition(data, "test")


def _run(tmp_path, definition, doc: DocJob):
    store = Store(tmp_path / "store")
    runner = BatchRunner(definition, store, "r1")
    result = runner.run(BatchJob("r1", str(tmp_path / "store"), _segment(definition), "b0", [doc]))
    rows = store.current("extract", "pages", include_run="r1").to_pylist()
    return result, rows


def test_a_file_gone_since_the_scan_fails_alone_with_the_reason(tmp_path):
    doc = DocJob("a" * 64, "gone.txt", str(tmp_path / "gone.txt"), 10, 0.0, 0, False)
    result, rows = _run(tmp_path, _definition(), doc)
    assert [r["status"] for r in rows] == ["failed"]
    assert rows[0]["reason"] == "cannot read file: No such file or directory"
    assert rows[0]["error_type"] == "FileNotFoundError"
    assert result.failures == [("gone.txt", "extract", "cannot read file: No such file or directory")]


def _sha(data: bytes) -> str:
    """A document's id is the SHA-256 of its bytes (the runner checks it on reading)."""
    return hashlib.sha256(data).hexdigest()


def test_a_file_over_the_size_limit_is_not_read_at_all(tmp_path):
    # The path does not exist: had the runner tried to read it, the reason would say so.
    doc = DocJob("b" * 64, "huge.pdf", str(tmp_path / "huge.pdf"), 3_000_000, 0.0, 0, False)
    _, rows = _run(tmp_path, _definition(max_file_mb=1), doc)
    assert rows[0]["reason"] == "file too large: 3.0 MB over the limit of 1 MB"


def test_a_step_that_raises_fails_that_document_with_its_traceback(tmp_path):
    (tmp_path / "ok.md").write_text("# Heading\n\nSome text about the reading room.\n")
    data = _document_steps(yaml.safe_load(default_config_text()))
    data["steps"].insert(1, {"step": "example_steps:MASK_EMAILS"})
    definition = build_definition(data, "test")
    step = definition.steps[1]
    broken = type(step.spec)(**{**step.spec.__dict__, "run": lambda pages, params, ctx: 1 / 0})
    object.__setattr__(step, "spec", broken)
    store = Store(tmp_path / "store")
    doc = DocJob(_sha((tmp_path / "ok.md").read_bytes()), "ok.md", str(tmp_path / "ok.md"), 40, 0.0, 0, False)
    BatchRunner(definition, store, "r1").run(BatchJob("r1", store.root, _segment(definition), "b0", [doc]))
    rows = store.current("mask_emails", "pages", include_run="r1").to_pylist()
    assert len(rows) == 1 and rows[0]["locator"] == "document"
    assert rows[0]["reason"] == "mask_emails failed: ZeroDivisionError: division by zero"
    assert "ZeroDivisionError" in rows[0]["traceback"]
    # The unit names the pages it could not handle, so the trail stays connected.
    extract_ids = {r["unit_id"] for r in store.current("extract", "pages", include_run="r1").to_pylist()}
    assert set(rows[0]["parent_ids"]) == extract_ids


def _guarded_definition(limit: float):
    data = _document_steps(yaml.safe_load(default_config_text()))
    data["steps"][0] = {"step": "example_steps:STUBBORN_EXTRACT", "params": {"time_limit_seconds": limit}}
    return build_definition(data, "test")


def test_a_hung_parser_is_stopped_at_the_time_limit_and_the_batch_goes_on(tmp_path):
    files = {"hangs.txt": "PLEASE HANG while reading this file, which a real parser might do.\n",
             "fine.txt": "An ordinary note about the mobile library timetable for the spring term.\n",
             "dies.txt": "PLEASE CRASH the way a parser in C code can take its process down.\n"}
    docs = []
    for i, (name, text) in enumerate(files.items()):
        (tmp_path / name).write_text(text)
        docs.append(DocJob(_sha(text.encode()), name, str(tmp_path / name), len(text), 0.0, 0, False))
    store = Store(tmp_path / "store")
    definition = _guarded_definition(1.5)
    BatchRunner(definition, store, "r1").run(BatchJob("r1", store.root, _segment(definition), "b0", docs))
    rows = {r["source_path"]: r for r in store.current("extract", "pages", include_run="r1").to_pylist()}
    assert rows["hangs.txt"]["status"] == "failed"
    reason = rows["hangs.txt"]["reason"]
    assert reason.startswith("time limit: extract was stopped after ") and "over its limit of 1.5 s" in reason
    # The row records the time the work ran, not the configured limit: at the limit, give
    # or take the parent's polling (0.5 s covers a loaded machine).
    taken = float(reason.split("stopped after ")[1].split(" s")[0])
    assert 1.5 <= taken < 2.0
    assert abs(rows["hangs.txt"]["document_ms"] / 1000.0 - taken) < 0.01
    assert rows["hangs.txt"]["error_type"] == "TimeLimitExceeded"
    assert rows["dies.txt"]["status"] == "failed"
    assert rows["dies.txt"]["reason"] == "extract crashed: the parser process died (exit code 70)"
    assert rows["fine.txt"]["status"] == "ok"  # the document after the hang got a fresh process
    split = store.current("split", "chunks", include_run="r1").to_pylist()
    assert [r["source_path"] for r in split] == ["fine.txt"]


def test_a_worker_that_dies_on_a_document_read_from_the_store_costs_that_document_alone(tmp_path):
    """A segment after a corpus step reads its inputs in the warm worker, once per batch;
    the worker that replaces a dead one reads what is left of the batch again."""
    files = {"a.txt": "The reading room opens at nine on weekdays and at ten on Saturdays.\n",
             "b.txt": "PLEASE CRASH the way a step in C code can take its process down.\n",
             "c.txt": "The mobile library visits the northern villages every second Tuesday.\n"}
    data = _document_steps(yaml.safe_load(default_config_text()))
    data["steps"].insert(1, {"step": "example_steps:FRAGILE_PAGES"})
    definition = build_definition(data, "test")
    store = Store(tmp_path / "store")
    docs = []
    for name, text in files.items():
        (tmp_path / name).write_text(text)
        docs.append(DocJob(_sha(text.encode()), name, str(tmp_path / name), len(text), 0.0, 0, False))
    runner = BatchRunner(definition, store, "r1")
    runner.run(BatchJob("r1", store.root, [0], "b0", docs))  # extract, stored
    later = [DocJob(d.doc_id, d.source_path, d.abs_path, d.size, d.mtime, 1, False) for d in docs]
    runner.run(BatchJob("r1", store.root, _segment(definition)[1:], "b1", later))
    extract = {}
    for r in store.current("extract", "pages", include_run="r1").to_pylist():
        extract.setdefault(r["source_path"], set()).add(r["unit_id"])
    rows = {r["source_path"]: r for r in store.current("fragile", "pages", include_run="r1").to_pylist()}
    assert rows["b.txt"]["reason"] == "fragile crashed: the parser process died (exit code 70)"
    assert rows["a.txt"]["status"] == rows["c.txt"]["status"] == "ok"
    # Lineage runs back to the stored extract rows, the failed document's included.
    for name in files:
        assert set(rows[name]["parent_ids"]) == extract[name]
    split = store.current("split", "chunks", include_run="r1").to_pylist()
    assert sorted({r["source_path"] for r in split}) == ["a.txt", "c.txt"]
