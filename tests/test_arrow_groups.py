"""Per-key figures without Arrow's query engine, checked against that engine itself
(pyarrow's `Table.group_by`, the reference) on random keys with ties."""

import random

import pyarrow as pa
import pytest

from thresher.flows.arrow_groups import count_and_sum_per_key, highest_per_key
from thresher.flows.store import read_parquet


def _columns(seed: int, n: int = 2000):
    rnd = random.Random(seed)
    keys = pa.chunked_array([[f"d{rnd.randrange(150):03d}" for _ in range(n // 2)],
                             [f"d{rnd.randrange(150):03d}" for _ in range(n - n // 2)]])
    values = pa.chunked_array([[rnd.randrange(5) for _ in range(n // 2)], [rnd.randrange(5) for _ in range(n - n // 2)]])
    return keys, values


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_highest_and_lowest_per_key_agree_with_pyarrows_group_by(seed):
    keys, values = _columns(seed)
    agg = pa.table({"k": keys, "v": values}).group_by("k").aggregate([("v", "max"), ("v", "min")])
    ref_max = dict(zip(agg.column("k").to_pylist(), agg.column("v_max").to_pylist()))
    ref_min = dict(zip(agg.column("k").to_pylist(), agg.column("v_min").to_pylist()))
    assert highest_per_key(keys, values) == ref_max
    assert highest_per_key(keys, values, lowest=True) == ref_min


def test_count_and_sum_per_key_agree_with_pyarrows_group_by():
    keys, values = _columns(4)
    values = pa.chunked_array([values.chunk(0), pa.array([None] * 3 + values.chunk(1).to_pylist()[3:])])
    agg = pa.table({"k": keys, "v": values}).group_by("k").aggregate([("k", "count"), ("v", "sum")])
    ref = sorted((k, n, s or 0) for k, n, s in zip(agg.column("k").to_pylist(), agg.column("k_count").to_pylist(),
                                                     agg.column("v_sum").to_pylist()))
    assert count_and_sum_per_key(keys, values) == ref


def test_reading_a_column_a_parquet_file_lacks_raises(tmp_path):
    import pyarrow.parquet as pq

    pq.write_table(pa.table({"a": [1, 2]}), tmp_path / "x.parquet")
    assert read_parquet(str(tmp_path / "x.parquet"), ["a"]).column("a").to_pylist() == [1, 2]
    with pytest.raises(pa.ArrowInvalid, match="no column b"):
        read_parquet(str(tmp_path / "x.parquet"), ["a", "b"])
