"""pyarrow without pandas until something hands pyarrow a pandas object.

(pyarrow's memory pool is chosen in flows/__init__.py, before pyarrow loads.)

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


answer_pandas_look()
