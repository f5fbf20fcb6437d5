"""The whole-pipeline flow as a Prefect deployment on a cron schedule, served by this process.

``deployment`` only describes it (a test can register it without blocking); ``serve`` checks that
a Prefect API is there, registers it and runs scheduled and hand-triggered runs until stopped.
"""

from __future__ import annotations

from typing import Any

from prefect import serve as prefect_serve
from prefect.client.orchestration import get_client
from prefect.deployments.runner import RunnerDeployment
from prefect.schedules import Cron
from prefect.settings import PREFECT_API_URL
from prefect.types.entrypoint import EntrypointType

from flows.thermal_run import thermal_ledger_run

HOW_TO_START = (
    "start one with `prefect server start` (in another terminal) and point PREFECT_API_URL at it,"
    " e.g. `prefect config set PREFECT_API_URL=http://127.0.0.1:4200/api`, then run serve again"
)


class PrefectUnavailable(RuntimeError):
    """No Prefect API answers, so a schedule cannot be registered nor kept."""


def deployment(
    config_path: str | None,
    overrides: dict[str, Any],
    cron: str,
    name: str,
    timezone: str = "UTC",
) -> RunnerDeployment:
    """The flow ``thermal-ledger-run`` as deployment ``name``: one cron schedule, the run's parameters.

    The entrypoint is the module path, so the served runs find the flow wherever the package is installed.
    """
    return thermal_ledger_run.to_deployment(
        name=name,
        schedule=Cron(cron, timezone=timezone),
        parameters={"config_path": config_path, "overrides": dict(overrides)},
        description=f"Thermal Ledger run on the schedule '{cron}' ({timezone}).",
        entrypoint_type=EntrypointType.MODULE_PATH,
    )


def require_api() -> str:
    """The URL of the Prefect API, after checking it answers; PrefectUnavailable saying how to start one."""
    url = PREFECT_API_URL.value()
    if not url:
        raise PrefectUnavailable(
            f"serve needs a running Prefect server and PREFECT_API_URL is not set: {HOW_TO_START}"
        )
    with get_client(sync_client=True) as client:
        error = client.api_healthcheck()
    if error is not None:
        raise PrefectUnavailable(
            f"no Prefect server answers at PREFECT_API_URL={url} ({error}): {HOW_TO_START}"
        )
    return url


def serve(served: RunnerDeployment) -> None:
    """Register ``served`` and run its scheduled and hand-triggered runs here until interrupted."""
    require_api()
    prefect_serve(served)
