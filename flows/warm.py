"""Imported once by the fork server of the worker processes (flows/isolate.py), so
every worker starts with the text steps and the store's readers imported, the default token encoding parsed
(with the per-token byte lengths split counts with) and the language profiles loaded,
instead of paying for them in each new worker."""

from __future__ import annotations

from thresher.flows import inputs, segment  # noqa: F401 - the code a worker runs (inputs reads the store)
# What a worker's first read of the store would import (inputs.read_units): pyarrow's
# dataset layer, and pandas through pyarrow's pandas metadata on the stage files; 0.9 s
# in each new worker at its first batch of stored inputs (measured in a fresh process),
# paid once here instead.
import pandas  # noqa: F401,E402
import pyarrow.dataset  # noqa: F401,E402
import pyarrow.pandas_compat  # noqa: F401,E402
from thresher.steps import clean, language, personal, split, tokens  # noqa: F401


def _preload() -> None:
    from thresher.flows.encodings import EncodingUnavailable, get_encoding
    from thresher.steps.token_offsets import _token_bytes

    try:
        _token_bytes(get_encoding("cl100k_base"))
    except EncodingUnavailable:
        pass  # a definition that needs it says so when its step runs
    language._detector(0)


_preload()
