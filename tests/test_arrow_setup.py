"""A thresher process reads and writes its tables without importing pandas, and pyarrow
still converts pandas objects for code that uses them (flows/arrow_setup.py)."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pyarrow as pa


def _run(code: str) -> str:
    # A new interpreter: pandas may be imported in this one already.
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, timeout=120)
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


def test_tables_are_allocated_from_jemalloc_unless_the_environment_says_otherwise():
    # pyarrow's default, mimalloc, held on to about a quarter more memory in a run
    # (flows/arrow_setup.py has the figures).
    code = """
        from thresher.flows import schema  # noqa: F401 - the pool is chosen when schemas load
        import pyarrow as pa

        t = pa.table({"text": ["a" * 1000] * 1000})
        print(pa.default_memory_pool().backend_name, pa.total_allocated_bytes() >= 1_000_000)
    """
    try:
        pa.jemalloc_memory_pool()
        expected = "jemalloc"
    except NotImplementedError:  # a pyarrow built without it
        expected = "system"
    assert _run(code) == f"{expected} True"

    env = {**os.environ, "ARROW_DEFAULT_MEMORY_POOL": "mimalloc"}
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True,
                         timeout=120, env=env)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "mimalloc True"
