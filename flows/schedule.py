"""The weekly deployment: `thresher schedule` registers it and serves its runs.

A scheduled run is a small parent flow that builds the flow from the definition it
was given and runs it as a subflow, so the definition's task runner applies (a
served flow is loaded from its module path, where options set in this process
would be lost).
"""

from __future__ import annotations

from typing import Any

from thresher.flows import runtime  # noqa: F401 - Prefect settings before Prefect loads

from prefect import flow
from prefect.deployments.runner import EntrypointType
from prefect.schedules import Cron
from prefect.states import Failed

from thresher.flows.config import FlowDefinition, build_definition

SCHEDULED_FLOW_NAME = "thresher-scheduled"


@flow(name=SCHEDULED_FLOW_NAME, persist_result=False, log_prints=False)
def scheduled(definition_data: dict[str, Any], origin: str, source_root: str, store_root: str,
              workers: int | None = None) -> dict[str, Any]:
    """One scheduled run of the flow definition over the source folder."""
    from thresher.flows import pipeline
    from thresher.flows.plan import TooManyRemovals

    definition = build_definition(definition_data, origin)
    try:
        return pipeline.run(definition, source_root, store_root, workers=workers, quiet=True)
    except TooManyRemovals as exc:  # refused before any change: Failed with the reason, no traceback
        return Failed(message=str(exc), data=exc)


def deployment_name(definition: FlowDefinition) -> str:
    return f"{SCHEDULED_FLOW_NAME}/{definition.model.schedule.deployment}"


def serve(definition: FlowDefinition, source_root: str, store_root: str, workers: int | None = None) -> None:
    """Register the deployment with its cron schedule and time zone, then serve until stopped."""
    sched = definition.model.schedule
    scheduled.serve(
        name=sched.deployment,
        schedule=Cron(sched.cron, timezone=sched.timezone),
        parameters={"definition_data": definition.model.model_dump(mode="json"), "origin": definition.origin,
                    "source_root": source_root, "store_root": store_root, "workers": workers},
        description=f"thresher: {definition.model.name} over {source_root}",
        tags=["thresher"],
        entrypoint_type=EntrypointType.MODULE_PATH,
        print_starting_message=False,
    )
