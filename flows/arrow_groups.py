"""Per-key figures over Arrow columns, by sorting, without Arrow's query engine.

`Table.group_by` and `Table.join` run on Acero, a query engine loaded (with
pyarrow.dataset) for groupings of a few thousand rows; the store's small reads need
neither. A stable sort and the ends of runs of equal keys give the same answers. Values must not
be null in `highest_per_key` (the store's attempt numbers and paths are not); a sum
counts a null as 0.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc


def run_ends(sorted_keys: pa.Array) -> pa.Array:
    """True at the last element of each run of equal keys in a sorted array."""
    if len(sorted_keys) == 0:
        return pa.array([], pa.bool_())
    ends = pc.not_equal(sorted_keys[:-1], sorted_keys[1:])
    return pa.concat_arrays([ends, pa.array([True])])


def highest_per_key(keys, values, lowest: bool = False) -> dict:
    """{key: its highest value} (or lowest) over two columns of equal length."""
    t = pa.table({"k": keys, "v": values})
    order = pc.sort_indices(t, sort_keys=[("k", "ascending"), ("v", "descending" if lowest else "ascending")])
    k = pc.take(t.column("k"), order).combine_chunks()
    ends = run_ends(k)
    return dict(zip(pc.filter(k, ends).to_pylist(), pc.filter(pc.take(t.column("v"), order), ends).to_pylist()))


def count_and_sum_per_key(keys, values) -> list[tuple[object, int, int]]:
    """(key, rows, sum of values) per distinct key, keys in sorted order."""
    t = pa.table({"k": keys, "v": values})
    order = pc.sort_indices(t, sort_keys=[("k", "ascending")])
    k = pc.take(t.column("k"), order).combine_chunks()
    ends = np.flatnonzero(run_ends(k).to_numpy(zero_copy_only=False))
    total = np.cumsum(pc.fill_null(pc.take(t.column("v"), order), 0).to_numpy().astype(np.int64))
    sums = np.diff(np.concatenate(([0], total[ends])))
    rows = np.diff(np.concatenate(([-1], ends)))
    return list(zip(pc.take(k, pa.array(ends)).to_pylist(), rows.tolist(), sums.tolist()))
