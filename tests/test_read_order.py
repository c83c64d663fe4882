"""Documents read back from the store after a corpus step are cheap to read a batch at
a time: batches follow the part files that hold them (inputs.read_order,
pipeline.make_batches' `order`), and a part's row groups are small enough that a read of
a few documents skips the rest by Parquet's statistics (store.part_group_rows)."""

from __future__ import annotations

import hashlib
import random
from datetime import datetime, timezone

import pyarrow.dataset as ds
import pyarrow.parquet as pq

from thresher.flows.execute import DocJob
from thresher.flows.inputs import Stage, read_order
from thresher.flows.pipeline import make_batches
from thresher.flows.rows import RowContext, rows_to_table, to_row
from thresher.flows.store import Store
from thresher.steps.units import Block, Page

RUN = "20260101T000000Z-aaaaaa"


def _doc_ids(n: int) -> list[str]:
    # Content hashes, as real doc_ids are: their order says nothing of where they are stored.
    return [hashlib.sha256(f"document {i}".encode()).hexdigest() for i in range(n)]


def _write(store: Store, stage: str, part: str, docs: list[str], text: str = "a page of text") -> None:
    rows = []
    for d in docs:
        ctx = RowContext(RUN, d, f"{d[:8]}.txt", stage, "1", "c1", "pages", None,
                         datetime(2026, 1, 1, tzinfo=timezone.utc), 1.0, {})
        rows.append(to_row(ctx, Page(locator="page/1", page=1, blocks=[Block("paragraph", text)])))
    store.write_stage_part(stage, RUN, part, rows_to_table(stage, "pages", rows), [(d, "document") for d in docs])


def test_documents_are_ordered_by_the_part_that_holds_them_then_by_doc_id(tmp_path):
    store = Store(tmp_path / "store")
    ids = _doc_ids(12)
    first, second = ids[:6], ids[6:]  # each part holds doc_ids from all over the hash space
    _write(store, "extract", "b00000", first)
    _write(store, "extract", "b00001", second)
    shuffled = random.Random(3).sample(ids, len(ids))

    order = read_order(store, (Stage("extract", "pages", False),), shuffled, RUN)

    assert order == sorted(first) + sorted(second)


def test_a_format_limited_stage_is_read_first_and_the_rest_from_the_stage_before(tmp_path):
    # As the clean segment reads its inputs: HTML pages from boilerplate (a step limited
    # to some formats), every other document from extract.
    store = Store(tmp_path / "store")
    ids = _doc_ids(9)
    html, other = ids[:4], sorted(ids[4:])
    _write(store, "extract", "b00000", html + other[2:])
    _write(store, "extract", "b00001", other[:2])
    _write(store, "boilerplate", "corpus", html)
    trail = (Stage("extract", "pages", False), Stage("boilerplate", "pages", True))

    order = read_order(store, trail, list(reversed(ids)) + ["not-stored"], RUN)

    assert order == sorted(html) + other[2:] + other[:2] + ["not-stored"]


def test_batches_follow_the_read_order_and_the_one_with_the_largest_document_goes_first():
    ids = _doc_ids(10)
    order = sorted(ids[:5]) + sorted(ids[5:])
    sizes = {d: 1_000 for d in ids}
    sizes[order[7]] = 50_000  # a large document in the last part's batch
    jobs = [DocJob(d, f"notes/{d[:8]}.md", f"/drive/notes/{d[:8]}.md", sizes[d], 0.0, 3, True)
            for d in random.Random(5).sample(ids, len(ids))]

    batches = make_batches(jobs, batch_size=5, workers=1, order=order)

    assert [[j.doc_id for j in b] for b in batches] == [order[5:], order[:5]]


def test_a_read_of_a_few_documents_skips_the_other_row_groups_of_a_part(tmp_path):
    store = Store(tmp_path / "store")
    ids = _doc_ids(60)
    _write(store, "extract", "b00000", ids, text="words of a long page " * 5_000)  # about 100 KB a page
    path = next((tmp_path / "store").rglob("part-b00000.parquet"))
    assert pq.ParquetFile(path).metadata.num_row_groups >= 5

    wanted = sorted(ids)[20:23]
    fragment = next(iter(ds.dataset([str(path)], format="parquet").get_fragments()))
    groups = fragment.split_by_row_group(filter=ds.field("doc_id").isin(wanted))
    assert len(groups) <= 2  # three neighbours in doc_id order sit in one or two groups

    got = store.current("extract", "pages", wanted, include_run=RUN)
    assert sorted(got.column("doc_id").to_pylist()) == wanted
