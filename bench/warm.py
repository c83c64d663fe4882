"""The temporary Prefect server's start, paid once before a benchmark times its runs
(as a weekly schedule pays it once), by running an empty flow in this process."""

from __future__ import annotations


def start_prefect() -> None:
    from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads
    from prefect import flow

    @flow
    def warm_up() -> int:
        return 0

    warm_up()
