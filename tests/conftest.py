"""Shared fixtures. Prefect runs embedded against a temporary database (its own
test harness), started once per session because it costs 10-15 s."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import pytest

from thresher.flows import runtime  # noqa: F401 - quiet, offline Prefect settings first

REPO = Path(__file__).resolve().parents[1]
SAMPLE = REPO / "sample_inputs"


def _set_sample_times() -> None:
    """The demo drive's modification times (git keeps none), before any test copies it."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("sample_times", REPO / "tools" / "sample_times.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.apply(SAMPLE)


_set_sample_times()


@pytest.fixture(scope="session")
def prefect_harness():
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=90):
        yield


@pytest.fixture(autouse=True)
def no_prefect_event_stream():
    """Every test starts with Prefect's event stream closed.

    A flow run in this process opens a websocket to the API (Prefect's `EventsWorker`)
    that stays open afterwards; its keepalive ping, every 20 s in Prefect's
    GlobalEventLoopThread, draws its payload from the global `random` module
    (`websockets` `Connection.ping`). A property test running at that moment sees the
    global random state change under it, which Hypothesis reports as "Do not use the
    random module inside strategies". Draining the worker delivers the queued events
    and closes the socket; the next flow run opens a new one. Runs after the session's
    and modules' fixtures, so flows run in their set-up are covered too.
    """
    if "prefect.events.worker" in sys.modules:
        from prefect.events.worker import EventsWorker

        EventsWorker.drain_all(timeout=30, at_exit=False)
    yield


@pytest.fixture()
def sample_drive(tmp_path: Path) -> Path:
    """A private copy of the demo drive, so a test may change files in it."""
    dst = tmp_path / "drive"
    shutil.copytree(SAMPLE, dst)
    return dst


@pytest.fixture(scope="session")
def harness_env(prefect_harness) -> dict:
    """Environment for child `thresher` processes: the harness's one Prefect API (so no
    child starts a server of its own) and the tests folder on the import path."""
    import os

    from prefect.settings import PREFECT_API_URL

    env = dict(os.environ)
    env["PREFECT_API_URL"] = PREFECT_API_URL.value()
    env["PYTHONPATH"] = os.pathsep.join([str(REPO / "tests"), env.get("PYTHONPATH", "")])
    return env


def definition_with(**params):
    """The embedded default definition with some steps' parameters set, by step name:
    definition_with(split={"max_tokens": 300})."""
    import yaml

    from thresher.flows.config import build_definition, default_config_text

    data = yaml.safe_load(default_config_text())
    for step in data["steps"]:
        step["params"] = {**(step.get("params") or {}), **params.get(step["step"], {})}
    return build_definition(data, "test")
