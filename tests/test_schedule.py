"""`thresher schedule` against a real, separately started Prefect server."""

from __future__ import annotations

import asyncio
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

from conftest import SAMPLE
from thresher.flows.config import load_definition
from thresher.flows.runtime import PREFECT_DEFAULTS
from thresher.flows.schedule import deployment_name
from thresher.flows.store import Store

BIN = Path(sys.executable).parent


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_healthy(api: str, proc: subprocess.Popen, seconds: float = 120) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"prefect server exited with {proc.returncode}: {proc.stderr.read()}")
        try:
            with urllib.request.urlopen(f"{api}/health", timeout=2) as r:
                if r.status == 200:
                    return
        except OSError:
            time.sleep(0.5)
    raise AssertionError("prefect server did not become healthy")


@pytest.fixture()
def prefect_server(tmp_path):
    """A real Prefect server on 127.0.0.1, with its own database."""
    port = _free_port()
    api = f"http://127.0.0.1:{port}/api"
    env = dict(os.environ)
    env.update(PREFECT_DEFAULTS)
    env.pop("PREFECT_API_URL", None)
    env["PREFECT_HOME"] = str(tmp_path / "prefect-server")
    proc = subprocess.Popen([str(BIN / "prefect"), "server", "start", "--host", "127.0.0.1", "--port", str(port)],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    try:
        _wait_healthy(api, proc)
        yield api
    finally:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)


def test_schedule_registers_the_weekly_cron_and_a_triggered_run_completes(prefect_server, tmp_path):
    drive = tmp_path / "drive"
    shutil.copytree(SAMPLE, drive)
    store = tmp_path / "store"
    env = dict(os.environ)
    env["PREFECT_API_URL"] = prefect_server
    env["PREFECT_HOME"] = str(tmp_path / "prefect-client")
    env["PREFECT_RUNNER_POLL_FREQUENCY"] = "1"
    serving = subprocess.Popen([str(BIN / "thresher"), "schedule", "--source", str(drive), "--store", str(store)],
                               env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                               start_new_session=True)
    definition = load_definition()
    name = deployment_name(definition)
    os.environ["PREFECT_API_URL"] = prefect_server  # for this process's client
    try:
        from prefect.client.orchestration import get_client
        from prefect.deployments import run_deployment
        from prefect.settings import PREFECT_API_URL, temporary_settings

        async def read():
            async with get_client() as client:
                return await client.read_deployment_by_name(name)

        with temporary_settings({PREFECT_API_URL: prefect_server}):
            deadline = time.monotonic() + 90
            deployment = None
            while deployment is None:
                assert serving.poll() is None, f"thresher schedule exited: {serving.stderr.read()}"
                try:
                    deployment = asyncio.run(read())
                except Exception:  # noqa: BLE001 - not registered yet
                    assert time.monotonic() < deadline, "the deployment never appeared"
                    time.sleep(1)
            crons = [(s.schedule.cron, s.schedule.timezone) for s in deployment.schedules]
            assert crons == [(definition.model.schedule.cron, definition.model.schedule.timezone)]
            assert deployment.parameters["store_root"] == str(store.resolve())

            flow_run = run_deployment(name, timeout=300, poll_interval=2)
            assert flow_run.state.is_completed(), flow_run.state
    finally:
        os.environ.pop("PREFECT_API_URL", None)
        os.killpg(serving.pid, signal.SIGINT)
        try:
            serving.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(serving.pid, signal.SIGKILL)
    runs = Store(store).runs()
    assert len(runs) == 1 and runs[0].manifest["chunks"] > 20
