"""A thresher process reads and writes its tables without importing pandas, and pyarrow
still converts pandas objects for code that uses them (flows/arrow_setup.py)."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap


def _run(code: str, env: dict[str, str] | None = None) -> str:
    # A new interpreter: pandas may be imported in this one already.
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, timeout=120,
                         env=env)
    assert out.returncode == 0, out.stderr
    return out.stdout.strip()


def test_a_store_round_trip_does_not_import_pandas(tmp_path):
    got = _run(f"""
        import sys
        import pyarrow as pa
        from thresher.flows.store import Store
        import pyarrow.dataset  # noqa: F401 - after the store, as a worker's preload imports it (flows/warm.py)

        store = Store({str(tmp_path)!r})
        assert store.catalog().num_rows == 0
        store.write_table("t.parquet", pa.table({{"doc_id": ["a", "b"]}}))
        assert store.read_table("t.parquet").column("doc_id").to_pylist() == ["a", "b"]
        print("pandas" in sys.modules)
    """)
    assert got == "False"


def test_pandas_objects_still_convert_both_ways():
    got = _run("""
        from thresher.flows import schema  # noqa: F401 - pyarrow's look for pandas answered
        import pandas as pd
        import pyarrow as pa

        df = pd.DataFrame({"chunk": ["a", "b"], "tokens": [3, 4]})
        t = pa.table(df)
        assert pa.Table.from_pandas(df).num_rows == 2
        assert str(pa.array(df["tokens"]).type) == "int64"
        back = t.to_pandas()
        print(type(back).__name__, back["tokens"].sum())
    """)
    assert got == "DataFrame 7"


def test_a_dataset_read_allocates_from_jemalloc_unless_the_environment_says_otherwise(tmp_path):
    # pyarrow's default, mimalloc, held on to about a third more memory in a run
    # (DEVELOPERS.md, stop 34, has the figures). A Parquet read through pyarrow.dataset takes
    # pyarrow's process-wide default pool, which pa.set_memory_pool does not change.
    pq_file = tmp_path / "t.parquet"
    code = f"""
        from thresher.flows.store import Store  # noqa: F401 - thresher first, as in a run
        import pyarrow as pa
        import pyarrow.dataset as ds
        import pyarrow.parquet as pq

        pq.write_table(pa.table({{"text": ["a" * 1000] * 1000}}), {str(pq_file)!r})
        t = ds.dataset({str(pq_file)!r}).to_table()
        print(pa.default_memory_pool().backend_name, pa.default_memory_pool().bytes_allocated() >= 1_000_000)
    """
    # This test process imported thresher too, so the variable is unset for the child.
    unset = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
    if sys.platform == "linux":
        assert _run(code, unset) == "jemalloc True"
    assert _run(code, {**unset, "ARROW_DEFAULT_MEMORY_POOL": "system"}) == "system True"
