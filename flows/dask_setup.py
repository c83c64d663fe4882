"""Preloaded by each worker of the local Dask cluster a run starts (pipeline._task_runner):
the worker's warm worker starts preloading as the Dask worker starts, not when its first
batch asks for it. Dask calls `dask_setup` once per worker, before it takes tasks."""

from __future__ import annotations

from thresher.flows.isolate import prewarm


def dask_setup(worker) -> None:  # noqa: ARG001 - Dask's preload hook passes the worker
    prewarm(1)
