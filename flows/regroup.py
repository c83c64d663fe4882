"""A stage's current rows sorted once into a reader's own groups of documents.

A stage's part files hold documents in the order their batches ran (largest first, or
the order of the parts they were read from), each part sorted by doc_id. A reader that
wants the documents in another order, a group at a time (the hand-off: path order),
and filters every group out of the store decodes most of every part for every group:
the work grows with the groups times the stage. Regrouped reads each stage once, in
its stored order (neighbouring documents, so few row groups per read), and appends the
rows to local scratch files (Arrow IPC, LZ4), one per bucket of consecutive groups.
The reader asks for the groups in order; a bucket is read back whole when its first
group is asked for, split into its groups in memory, and dropped at the next bucket.
So every row is written once and read once, and memory holds one read of READ_DOCS
documents while sorting, then one bucket per stage.
"""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from thresher.flows import schema
from thresher.flows.inputs import Stage, read_order
from thresher.flows.store import Store

# Documents per read of the store: neighbours in stored order, so a read touches few
# part files and few row groups in each.
READ_DOCS = 500
# Groups per bucket file, at least: a few thousand documents' rows in memory at a time.
BUCKET_GROUPS = 10
# Bucket files open at once while a stage is sorted, at most (a file descriptor each):
# past this the buckets take more groups each.
MAX_BUCKETS = 256
_GROUP = "__group"
_IPC = pa.ipc.IpcWriteOptions(compression="lz4")


def _runs(keys: np.ndarray) -> list[tuple[int, int]]:
    """(start, end) of each run of equal values in a sorted array."""
    cuts = [0, *(np.flatnonzero(np.diff(keys)) + 1).tolist(), len(keys)]
    return list(zip(cuts, cuts[1:]))


class Regrouped:
    """Current chunk rows of some stages (each with its own columns), for `groups` of
    doc_ids, kept in files under `into` (a scratch folder the caller owns and removes)."""

    def __init__(self, store: Store, run_id: str | None, stages: list[tuple[str, list[str]]],
                 groups: list[list[str]], into: str):
        self.per = max(BUCKET_GROUPS, -(-len(groups) // MAX_BUCKETS))
        self.schemas: dict[str, pa.Schema] = {}
        self.files: dict[tuple[str, int], str] = {}  # (stage, bucket) -> its file
        self.held: dict[str, tuple[int, dict[int, pa.Table]]] = {}  # stage -> (bucket, rows by group)
        docs = [d for g in groups for d in g]
        doc_arr = pa.array(docs, pa.string())
        group_arr = pa.array(np.repeat(np.arange(len(groups)), [len(g) for g in groups]), pa.int64())
        for stage, columns in stages:
            self.schemas[stage] = schema.stage_schema(stage, "chunks").empty_table().select(columns).schema
            stored = read_order(store, [Stage(stage, "chunks", False)], docs, run_id)
            writers: dict[int, tuple[pa.OSFile, pa.ipc.RecordBatchFileWriter]] = {}
            try:
                for start in range(0, len(stored), READ_DOCS):
                    t = store.current(stage, "chunks", stored[start:start + READ_DOCS], columns=columns,
                                      include_run=run_id)
                    if t.num_rows:
                        group = pc.take(group_arr, pc.index_in(t.column("doc_id"), value_set=doc_arr))
                        self._append(stage, t.append_column(_GROUP, group), writers, into)
            finally:
                for sink, writer in writers.values():
                    writer.close()
                    sink.close()

    def _append(self, stage: str, t: pa.Table, writers: dict, into: str) -> None:
        bucket = pc.divide(t.column(_GROUP), self.per)  # integer division
        order = pc.sort_indices(bucket)
        t, bucket = t.take(order).combine_chunks(), pc.take(bucket, order).to_numpy()
        for a, z in _runs(bucket):
            b = int(bucket[a])
            if b not in writers:
                path = self.files[stage, b] = os.path.join(into, f"{stage}-{b:06d}.arrow")
                sink = pa.OSFile(path, "wb")
                writers[b] = (sink, pa.ipc.new_file(sink, t.schema, options=_IPC))
            writers[b][1].write_table(t.slice(a, z - a))

    def read(self, stage: str, group: int) -> pa.Table:
        """The group's rows of the stage (an empty table when it has none there).
        Groups are best asked for in order: a bucket is read whole at each change."""
        bucket = group // self.per
        held = self.held.get(stage)
        if held is None or held[0] != bucket:
            held = self.held[stage] = (bucket, self._load(stage, bucket))
        return held[1].get(group, self.schemas[stage].empty_table())

    def _load(self, stage: str, bucket: int) -> dict[int, pa.Table]:
        path = self.files.get((stage, bucket))
        if path is None:
            return {}
        with pa.OSFile(path) as source:  # read into memory: nothing refers to the file after
            t = pa.ipc.open_file(source).read_all()
        order = pc.sort_indices(t.column(_GROUP))  # stable: rows keep their order within a group
        t = t.take(order).combine_chunks()
        group = t.column(_GROUP).to_numpy()
        t = t.drop_columns([_GROUP])
        return {int(group[a]): t.slice(a, z - a) for a, z in _runs(group)}
