"""Prefect for the benchmarks: the temporary server's start, paid once before a
benchmark times its runs (as a weekly schedule pays it once), by running an empty flow
in this process; or a server of its own for this process and its children."""

from __future__ import annotations

import os
from contextlib import contextmanager


def start_prefect() -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads
    from prefect import flow

    @flow
    def warm_up() -> int:
        return 0

    warm_up()


def start_prefect_server():
    """A Prefect server of its own, started on a free port of 127.0.0.1: prefect's
    SubprocessASGIServer, its process a child of this one (`server.stop()` ends it)."""
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads
    from prefect.server.api.server import SubprocessASGIServer

    from thresher.flows.pipeline import _free_port

    server = SubprocessASGIServer(port=_free_port())
    server.start(timeout=120)
    return server


@contextmanager
def prefect_server():
    """start_prefect_server() for this process and its children: PREFECT_API_URL is set
    while the block runs."""
    server = start_prefect_server()
    before = os.environ.get("PREFECT_API_URL")
    os.environ["PREFECT_API_URL"] = server.api_url
    try:
        yield server
    finally:
        server.stop()
        if before is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = before
