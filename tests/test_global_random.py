"""Nothing left running by an in-process flow run changes the global `random` state.

Hypothesis checks that the global random state is the same before and after each draw
and warns "Do not use the random module inside strategies" otherwise; another thread
changing it makes a property test warn and draw differently from run to run.
"""

from __future__ import annotations

import random
import shutil
import threading
import time

import pytest

from conftest import SAMPLE
from thresher.flows import pipeline
from thresher.flows.config import load_definition

# The keepalive interval of websockets' asyncio client, `connect(ping_interval=20)`
# (websockets/asyncio/client.py as installed), which Prefect's `websocket_connect` does
# not change. Watching a little longer than one interval sees at least one ping of an
# events connection left open; the ping's payload is `random.getrandbits(32)`.
WATCH_SECONDS = 22


@pytest.fixture(scope="module")
def flow_ran_in_process(prefect_harness, tmp_path_factory):
    base = tmp_path_factory.mktemp("flow")
    shutil.copytree(SAMPLE / "board", base / "drive")
    m = pipeline.run(load_definition(None), str(base / "drive"), str(base / "store"), quiet=True)
    assert m["documents"]["processed"] == 2
    return m


def test_the_global_random_state_stays_put_after_an_in_process_run(flow_ran_in_process):
    before = random.getstate()
    deadline = time.monotonic() + WATCH_SECONDS
    while time.monotonic() < deadline:
        time.sleep(0.25)
        assert random.getstate() == before, (
            "the global random state changed while this test did nothing; threads: "
            f"{sorted(t.name for t in threading.enumerate())}")
