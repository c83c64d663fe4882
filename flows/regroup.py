"""A stage's current rows sorted once into a reader's own groups of documents.

A stage's part files hold documents in the order their batches ran (largest first, or
the order of the parts they were read from), each part sorted by doc_id. A reader that
wants the documents in another order, a group at a time (the hand-off: path order),
and filters every group out of the store decodes most of every part for every group:
the work grows with the groups times the stage. Regrouped reads each stage once, in
its stored order (neighbouring documents, so few row groups per read), and writes
each group's rows to local scratch files (Arrow IPC, LZ4), from which a group is
read back alone. Memory holds one read of GROUP_DOCS documents at a time.
"""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from thresher.flows import schema
from thresher.flows.store import Store

# Documents per read of the store: neighbours in stored order, so a read touches few
# part files and few row groups in each.
READ_DOCS = 500
_IPC = pa.ipc.IpcWriteOptions(compression="lz4")


class Regrouped:
    """Current chunk rows of some stages (each with its own columns), for `groups` of
    doc_ids, kept in files under `into` (a scratch folder the caller owns and removes)."""

    def __init__(self, store: Store, run_id: str | None, stages: list[tuple[str, list[str]]],
                 groups: list[list[str]], into: str):
        self.into = into
        self.schemas: dict[str, pa.Schema] = {}
        self.where: dict[tuple[str, int], list[tuple[str, int]]] = {}  # (stage, group) -> (file, batch)
        docs = [d for g in groups for d in g]
        doc_arr = pa.array(docs, pa.string())
        group_arr = pa.array(np.repeat(np.arange(len(groups)), [len(g) for g in groups]), pa.int64())
        for stage, columns in stages:
            self.schemas[stage] = schema.stage_schema(stage, "chunks").empty_table().select(columns).schema
            parts = store.doc_parts(stage, include_run=run_id)
            stored = sorted(docs, key=lambda d: ((parts.get(d) or [""])[-1], d))
            for n, start in enumerate(range(0, len(stored), READ_DOCS)):
                t = store.current(stage, "chunks", stored[start:start + READ_DOCS], columns=columns,
                                  include_run=run_id)
                if t.num_rows:
                    self._write(stage, n, t, pc.take(group_arr, pc.index_in(t.column("doc_id"), value_set=doc_arr)))

    def _write(self, stage: str, n: int, t: pa.Table, group: pa.Array) -> None:
        order = pc.sort_indices(group)  # stable: rows keep their order within a group
        t, group = t.take(order).combine_chunks(), pc.take(group, order).to_numpy()
        cuts = [0, *(np.flatnonzero(np.diff(group)) + 1).tolist(), len(group)]
        path = os.path.join(self.into, f"{stage}-{n:06d}.arrow")
        batch_no = 0
        with pa.OSFile(path, "wb") as sink, pa.ipc.new_file(sink, t.schema, options=_IPC) as writer:
            for a, z in zip(cuts, cuts[1:]):
                for batch in t.slice(a, z - a).to_batches():
                    writer.write_batch(batch)
                    self.where.setdefault((stage, int(group[a])), []).append((path, batch_no))
                    batch_no += 1

    def read(self, stage: str, group: int) -> pa.Table:
        """The group's rows of the stage (an empty table when it has none there)."""
        batches = []
        for path, batch_no in self.where.get((stage, group), []):
            with pa.OSFile(path) as source:  # read into memory: nothing refers to the file after
                batches.append(pa.ipc.open_file(source).get_batch(batch_no))
        return pa.Table.from_batches(batches, schema=self.schemas[stage])
