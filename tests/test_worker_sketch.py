"""Dedup's sketch made in the warm worker, right after the chunks are made, and taken
up by the corpus step in place of its own (flows/segment.py sketch_here, corpus._Made)."""

from __future__ import annotations

import hashlib

import pyarrow as pa
import yaml

from thresher.flows.config import build_definition, default_config_text
from thresher.flows.corpus import _docs_of, _read_inputs, run_corpus_step
from thresher.flows.execute import BatchJob, BatchRunner, DocJob
from thresher.flows.store import Store
from thresher.steps.dedup import sketch

# Invented text for a fictional county library service. b.md repeats a.md's second
# section word for word, so the corpus step has a duplicate to find.
FILES = {
    "a.md": "# Opening hours\n\nThe reading room opens at nine on weekdays and at ten on Saturdays; "
            "it closes at six except on the first Monday of the month, when staff training runs late.\n\n"
            "# Borrowing\n\nA member may borrow twelve items at once for three weeks, and renew each "
            "item twice unless another member has reserved it.\n",
    "b.md": "# Mobile library\n\nThe mobile library visits the northern villages every second Tuesday "
            "and parks outside the village hall from ten until two.\n\n"
            "# Borrowing\n\nA member may borrow twelve items at once for three weeks, and renew each "
            "item twice unless another member has reserved it.\n",
}


def _definition():
    """The default chain up to dedup: one batch runs the document steps before it."""
    data = yaml.safe_load(default_config_text())
    data["steps"] = [s for s in data["steps"] if s["step"] not in ("boilerplate", "tokens")]
    return build_definition(data, "test")


def _processed(tmp_path, name: str = "store", definition=None):
    """The document steps before dedup run on FILES in one batch: (definition, store,
    dedup's index, live documents, the batch's result)."""
    definition = definition or _definition()
    dedup = [s.name for s in definition.steps].index("dedup")
    store = Store(tmp_path / name)
    docs, live = [], {}
    for rank, (path, text) in enumerate(sorted(FILES.items())):
        (tmp_path / path).write_text(text)
        doc_id = hashlib.sha256(text.encode()).hexdigest()
        docs.append(DocJob(doc_id, path, str(tmp_path / path), len(text), 0.0, 0, False))
        live[doc_id] = (rank, path, 0)
    result = BatchRunner(definition, store, "r1").run(BatchJob("r1", store.root, list(range(dedup)), "b0", docs))
    return definition, store, dedup, live, result


def _sorted(table: pa.Table) -> pa.Table:
    return table.sort_by([("doc_id", "ascending"), ("chunk_index", "ascending")])


def test_the_worker_sketches_each_document_as_the_corpus_step_would_from_the_stored_chunks(tmp_path):
    definition, store, dedup, live, result = _processed(tmp_path)
    made = result.sketches[dedup]
    inputs = _read_inputs(store, definition, dedup, sorted(live), "r1")
    docs = _docs_of(inputs, sorted(live), live)
    own = sketch(docs, definition.steps[dedup].params)
    assert own.num_rows == sum(len(d.chunks) for d in docs) >= 4
    assert _sorted(made).equals(_sorted(own))


def _decisions(store: Store) -> dict[str, tuple]:
    rows = store.current("dedup", "chunks", include_run="r1").to_pylist()
    return {r["chunk_id"]: (r["status"], r["duplicate_of"]) for r in rows}


def test_the_corpus_step_takes_the_workers_sketch_and_resketches_a_document_it_cannot_trust(tmp_path):
    definition, store, dedup, live, result = _processed(tmp_path)
    plain = _processed(tmp_path, "plain")
    run_corpus_step(definition, plain[1], "r1", dedup, live, set(live))
    truth = _decisions(plain[1])
    assert sorted(s for s, _ in truth.values()) == ["dropped", "ok", "ok", "ok"]

    # The worker's sketch is what the step decides on: with one chunk's content hash made
    # equal to another's (ids unchanged), that chunk becomes an exact duplicate.
    made = result.sketches[dedup]
    hashes = made.column("content_hash").to_pylist()
    kept = [c for c, (s, _) in truth.items() if s == "ok"]
    ids = made.column("chunk_id").to_pylist()
    a, b = ids.index(kept[0]), ids.index(kept[1])
    hashes[b] = hashes[a]
    tampered = made.set_column(made.column_names.index("content_hash"), "content_hash", pa.array(hashes))
    run_corpus_step(definition, store, "r1", dedup, live, set(live), None, [tampered])
    assert sum(s == "dropped" for s, _ in _decisions(store).values()) == 2

    # A document sketched twice (two batches) is sketched again by the step itself.
    again = _processed(tmp_path, "again")
    doubled = [tampered, tampered]
    run_corpus_step(definition, again[1], "r1", dedup, live, set(live), None, doubled)
    assert _decisions(again[1]) == truth
