"""Imported once by the fork server of the worker processes (flows/isolate.py), so
every worker starts with the text steps and the store's readers imported, the default token encoding parsed
(with the per-token byte lengths split counts with) and the language profiles loaded,
instead of paying for them in each new worker."""

from __future__ import annotations

import importlib

from thresher.flows import inputs, segment  # noqa: F401 - the code a worker runs (inputs reads the store)
from thresher.steps import clean, language, personal, split, tokens  # noqa: F401


# What a worker's first read of stored inputs imports (inputs.read_units): pyarrow's
# dataset layer, which imported pandas with it (0.56-0.88 s in a fresh process; since
# flows/arrow_setup.py keeps pandas out, about 0.01 s after the preload). Not in the
# preload, which holds up a run's first document (its first document waited 1.4-1.8 s
# against 0.1-1.4 s without it, bench runners, load 1.2-2.1); a worker imports it the
# first time it waits for work after a call (isolate._child_main), with the default
# chain while the parent runs dedup, so its first batch of stored inputs finds it
# (without it, the tokens segment's workers each waited 1.2-1.5 s at their first batch).
LATER = ("pyarrow.dataset",)
_later_done = False


def when_idle() -> None:
    global _later_done
    if not _later_done:
        _later_done = True
        for name in LATER:
            importlib.import_module(name)


def _preload() -> None:
    from thresher.flows.encodings import EncodingUnavailable, get_encoding
    from thresher.steps.token_offsets import _token_bytes

    try:
        _token_bytes(get_encoding("cl100k_base"))
    except EncodingUnavailable:
        pass  # a definition that needs it says so when its step runs
    language._detector(0)


_preload()
