"""Imported once by the fork server of the worker processes (flows/isolate.py), so
every worker starts with the text steps and the store's readers imported, the default token encoding parsed
(with the per-token byte lengths split counts with) and the language profiles loaded,
instead of paying for them in each new worker."""

from __future__ import annotations

import gc

from thresher.flows import inputs, segment  # noqa: F401 - the code a worker runs (inputs reads the store)
from thresher.steps import clean, language, personal, split, tokens  # noqa: F401

# pyarrow's dataset layer: what a worker's first read of stored inputs (inputs.read_units)
# imports. It was imported in a worker's first wait for work, apart from the preload,
# while it brought pandas with it (0.56-0.88 s); with pandas kept out (flows/schema.py
# loads flows/arrow_setup.py, above) it takes about 0.01 s.
import pyarrow.dataset  # noqa: E402, F401  isort: skip


def _preload() -> None:
    from thresher.flows.encodings import EncodingUnavailable, get_encoding
    from thresher.steps.token_offsets import _token_bytes

    try:
        _token_bytes(get_encoding("cl100k_base"))
    except EncodingUnavailable:
        pass  # a definition that needs it says so when its step runs
    language._detector(0)



_preload()

# Everything loaded so far (modules, the language profiles' hundreds of thousands of
# lists) lives as long as the worker: kept out of the cyclic collector's scans, a
# full collection in a worker no longer walks it (one cost 100-170 ms in a 2 ms
# document's step, tests/test_isolate.py). Workers forked from this process inherit it.
gc.freeze()
