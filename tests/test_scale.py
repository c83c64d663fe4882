"""Scale-out: process pools, a real Dask cluster, and a store on object storage give the
same hand-off as one worker."""

from __future__ import annotations

import logging
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pyarrow as pa
import pytest
import yaml

from thresher.flows import pipeline
from thresher.flows.config import build_definition, default_config_text
from thresher.flows.store import Store

BIN = Path(sys.executable).parent


def _definition(kind: str, workers: int = 2, address: str | None = None):
    data = yaml.safe_load(default_config_text())
    data["runner"] = {"kind": kind, "workers": workers, "batch_size": 3}
    if address:
        data["runner"]["address"] = address
    return build_definition(data, f"test-{kind}")


def _handoff_bytes(store: Store) -> bytes:
    """The hand-off's content as Arrow IPC bytes, without the run id (runs differ in it)."""
    table = store.handoff().drop_columns(["run_id"]).replace_schema_metadata(None)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


@pytest.fixture(scope="module")
def one_worker(tmp_path_factory, prefect_harness):
    import shutil

    from conftest import SAMPLE

    base = tmp_path_factory.mktemp("one")
    drive = base / "drive"
    shutil.copytree(SAMPLE, drive)
    pipeline.run(_definition("sequential", 1), str(drive), str(base / "store"), quiet=True)
    return drive, _handoff_bytes(Store(base / "store"))


@pytest.mark.parametrize("kind", ["threads", "processes"])
def test_threads_and_processes_hand_off_what_one_worker_does(one_worker, tmp_path, kind):
    drive, expected = one_worker
    m = pipeline.run(_definition(kind, 2), str(drive), str(tmp_path / "store"), quiet=True)
    assert m["documents"]["processed"] == m["documents"]["distinct"]
    assert _handoff_bytes(Store(tmp_path / "store")) == expected


def test_a_process_pool_leaves_dask_unloaded(prefect_harness):
    # A task run in a pool process hydrates its flow run's context; looking up the block
    # type its result store names made Prefect import every installed collection,
    # prefect-dask with dask and distributed among them: 0.33 s of CPU in each pool
    # process, for a runner that never uses Dask (runtime.collections_without_dask).
    from prefect import flow, task

    @task
    def modules_here() -> dict:
        from prefect.plugins import load_prefect_collections

        return {"distributed": "distributed" in sys.modules, "collections": sorted(load_prefect_collections())}

    @flow(task_runner=pipeline._task_runner("processes", 1), persist_result=False)
    def probe() -> dict:
        return modules_here.submit().result()

    seen = probe()
    assert seen["distributed"] is False
    assert "prefect_dask" not in seen["collections"]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture()
def dask_cluster(tmp_path):
    """A real Dask scheduler and two workers on 127.0.0.1, as separate processes."""
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ)
    # Workers that may start child processes, so extraction's time limit is enforced there too.
    env["DASK_DISTRIBUTED__WORKER__DAEMON"] = "False"
    procs = [subprocess.Popen([str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--no-dashboard"], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                              start_new_session=True)]
    try:
        from distributed import Client

        deadline = time.monotonic() + 60
        while True:
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=1):
                    break
            except OSError:
                assert time.monotonic() < deadline, "the Dask scheduler did not start"
                time.sleep(0.3)
        for n in range(2):
            procs.append(subprocess.Popen(
                [str(BIN / "dask"), "worker", address, "--nworkers", "1", "--nthreads", "1", "--no-dashboard",
                 "--name", f"w{n}", "--local-directory", str(tmp_path / f"w{n}")],
                env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=90)
        yield address
    finally:
        for p in reversed(procs):
            try:
                os.killpg(p.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)


def test_a_run_on_an_existing_dask_cluster_hands_off_what_one_worker_does(one_worker, dask_cluster, tmp_path):
    drive, expected = one_worker
    store_dir = tmp_path / "store"
    m = pipeline.run(_definition("dask", address=dask_cluster), str(drive), str(store_dir), quiet=True)
    assert m["documents"]["processed"] == m["documents"]["distinct"]
    assert _handoff_bytes(Store(store_dir)) == expected
    # Extraction ran in the cluster's workers, with the time limit in force there.
    rows = Store(store_dir).current("extract", "pages").to_pylist()
    assert not any("time limit not enforced" in w for r in rows for w in (r["warnings"] or []))


@pytest.fixture()
def s3_endpoint(monkeypatch):
    """An S3-compatible endpoint on 127.0.0.1. No real object store runs on this machine:
    this is moto's S3 server (an emulator of the S3 HTTP API), the closest stand-in."""
    from moto.server import ThreadedMotoServer
    import pyarrow.fs as pafs

    logging.getLogger("werkzeug").setLevel(logging.ERROR)
    for k, v in {"AWS_ACCESS_KEY_ID": "thresher-test", "AWS_SECRET_ACCESS_KEY": "thresher-test",
                 "AWS_DEFAULT_REGION": "us-east-1"}.items():
        monkeypatch.setenv(k, v)
    port = _free_port()
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=port, verbose=False)
    server.start()
    fs = pafs.S3FileSystem(endpoint_override=f"127.0.0.1:{port}", scheme="http", region="us-east-1",
                           allow_bucket_creation=True)
    fs.create_dir("thresher-store")
    try:
        yield f"127.0.0.1:{port}"
    finally:
        server.stop()


def test_a_store_on_object_storage_hands_off_what_a_local_one_does(one_worker, s3_endpoint, tmp_path):
    drive, expected = one_worker
    root = f"s3://thresher-store/weekly?endpoint_override={s3_endpoint}&scheme=http&region=us-east-1"
    first = pipeline.run(_definition("threads", 2), str(drive), root, quiet=True)
    store = Store(root)
    assert [r.run_id for r in store.runs()] == [first["run_id"]]
    assert _handoff_bytes(store) == expected
    assert store.lock_holder() is None  # released
    again = pipeline.run(_definition("threads", 2), str(drive), root, quiet=True)
    assert again["documents"]["processed"] == 0 and again["changes"] == {"upsert": 0, "delete": 0}
    # A second writer while one holds the (advisory) lock is refused.
    store.acquire_lock("holder")
    from thresher.flows.store import StoreLocked

    with pytest.raises(StoreLocked, match="is in use by run holder"):
        pipeline.run(_definition("threads", 2), str(drive), root, quiet=True)
    store.release_lock("holder")
