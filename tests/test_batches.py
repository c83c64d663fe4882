"""How a segment's documents are grouped into batches (one Prefect task run each)."""

from __future__ import annotations

from thresher.flows.execute import DocJob
from thresher.flows.pipeline import make_batches


def _jobs(sizes: list[int]) -> list[DocJob]:
    return [DocJob(f"d{i}", f"notes/n{i}.md", f"/drive/notes/n{i}.md", size, 0.0, 0, True)
            for i, size in enumerate(sizes)]


def test_a_quiet_weeks_few_small_edits_go_in_one_batch():
    # Three edited notes of a few KB, two workers: split by bytes they made three task
    # runs for a few milliseconds of work each.
    batches = make_batches(_jobs([2_000, 1_500, 1_200]), batch_size=32, workers=2)
    assert [len(b) for b in batches] == [3]


def test_large_documents_are_still_spread_over_batches_for_the_workers():
    batches = make_batches(_jobs([1 << 20] * 4 + [10_000] * 8), batch_size=32, workers=2)
    # Each 1 MiB file is over the per-batch budget (about 0.5 MiB): one batch each,
    # first; the small files share what is left.
    assert [len(b) for b in batches[:4]] == [1, 1, 1, 1]
    assert sum(len(b) for b in batches) == 12


def test_a_segment_of_chunk_steps_gets_one_batch_per_worker():
    # The tokens segment (after dedup): per document it only reads its chunks back and
    # reuses split's counts, so a batch per worker saves task runs and store reads.
    jobs = _jobs([1 << 20] * 6)
    assert len(make_batches(jobs, batch_size=32, workers=2)) == 6  # four per worker by bytes, one file each
    batches = make_batches(jobs, batch_size=32, workers=2, per_worker=1)
    assert [len(b) for b in batches] == [3, 3]
