"""How thresher sets up pyarrow: its memory pool, and no pandas until something hands
pyarrow a pandas object.

Memory pool: jemalloc where this pyarrow has it, else the C library's allocator, not
pyarrow's default mimalloc (pyarrow 26), which in a run held on to far more memory and
was slower. The documentation drive (`python -m bench docdrive`'s), a fresh process per
run, two rounds each, mimalloc then jemalloc (scratch timing): first run 68.5 and 69.1 s
against 65.0 and 66.0 s, its process's peak 1,307 and 1,261 MB against 948 and 949 MB;
a week with 1 % of the files edited 4.98 and 5.27 s against 3.07 and 3.61 s, peak 761
and 741 MB against 589 and 554 MB. ARROW_DEFAULT_MEMORY_POOL, if set, is left to decide.

pyarrow looks for pandas the first time it turns Python objects into arrays or back
(`pa.array`, `Table.to_pylist`, reading Parquet, `import pyarrow.dataset`) and, pandas
being installed, imports it: 0.22-0.25 s of CPU in every new process (a new process's
first `Store.catalog()` took 0.24 s, nearly all of it that import; pyarrow 26). thresher
never gives pyarrow a pandas object, so that first look is answered "not installed",
once, when thresher's schemas are loaded (flows/schema.py). pyarrow still takes pandas
objects it is given and `to_pandas()` still works, importing pandas then
(tests/test_arrow_setup.py).
"""

from __future__ import annotations

import os
import sys
import threading

import pyarrow as pa


class _Withheld:
    """Refuses pandas to one thread for the moment of pyarrow's look."""

    def __init__(self) -> None:
        self.thread = threading.get_ident()

    def find_spec(self, name, path=None, target=None):  # noqa: ARG002 - the finder protocol
        if (name == "pandas" or name.startswith("pandas.")) and threading.get_ident() == self.thread:
            raise ImportError("pandas left out of pyarrow's first look (thresher.flows.arrow_setup)")
        return None


def answer_pandas_look() -> None:
    if "pandas" in sys.modules:
        return  # imported already: nothing to save
    finder = _Withheld()
    sys.meta_path.insert(0, finder)
    try:
        pa.array([])  # pyarrow's first look for pandas (pyarrow.lib._PandasAPIShim)
    except Exception:  # noqa: BLE001 - another pyarrow may look differently: then it imports pandas as before
        pass
    finally:
        sys.meta_path.remove(finder)


def choose_memory_pool() -> None:
    if os.environ.get("ARROW_DEFAULT_MEMORY_POOL"):
        return  # the user's (or pyarrow's own documented) choice
    try:
        pa.set_memory_pool(pa.jemalloc_memory_pool())
    except NotImplementedError:  # a pyarrow built without jemalloc (Windows wheels)
        pa.set_memory_pool(pa.system_memory_pool())


choose_memory_pool()
answer_pandas_look()
