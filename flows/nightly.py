"""The nightly deployment: :func:`graphkit.flows.refresh.refresh_flow` served on a cron schedule in a time zone.

``graphkit schedule CONFIG --cron "0 2 * * *" --timezone Europe/Berlin`` calls :func:`serve_nightly`, which checks
the options, builds the deployment and serves it in this process until it is stopped (Ctrl-C / SIGTERM).

Only a long-running Prefect server fires schedules. Without ``PREFECT_API_URL`` Prefect starts a temporary server
that has no scheduler service: the deployment is registered but never runs on its own, so a warning says so.
"""

from __future__ import annotations

import asyncio
import sys
from datetime import datetime
from pathlib import Path

from graphkit.errors import ConfigError

__all__ = ["check_schedule", "build_deployment", "next_run_dates", "serve_nightly", "NO_SCHEDULER_WARNING"]

NO_SCHEDULER_WARNING = (
    "graphkit: warning: PREFECT_API_URL is not set, so Prefect uses a temporary server that has no scheduler: "
    "the deployment is registered but its cron schedule never fires. Start a long-running server with "
    "`prefect server start` and `export PREFECT_API_URL=http://127.0.0.1:4200/api` before `graphkit schedule`.")

# Characters Prefect does not accept in a deployment name.
_BAD_NAME_CHARS = set("/%&><")


def check_schedule(cron: str, timezone: str | None, name: str = "nightly-refresh") -> None:
    """Validate the schedule options the way Prefect will, before any server is contacted.

    Raises
    ------
    ConfigError
        Naming the option: ``--cron`` (not a five-field cron expression), ``--timezone`` (not an IANA time zone
        name) or ``--name`` (empty or holding one of ``/ % & > <``).
    """
    from prefect.client.schemas.schedules import CronSchedule
    from pydantic import ValidationError

    try:
        CronSchedule(cron=cron, timezone=timezone)
    except ValidationError as exc:
        err = exc.errors()[0]
        field = err["loc"][0] if err["loc"] else "cron"
        if field == "timezone":
            raise ConfigError(f"--timezone: not an IANA time zone name (such as UTC or Europe/Berlin), "
                              f"got {timezone!r}") from None
        raise ConfigError(f"--cron: not a valid cron expression (five fields: minute hour day-of-month month "
                          f"day-of-week, e.g. '0 2 * * *'), got {cron!r}") from None
    if not name or not name.strip() or _BAD_NAME_CHARS & set(name):
        raise ConfigError(f"--name: a deployment name must be non-empty and hold none of / % & > <, got {name!r}")


def build_deployment(config_path, *, cron: str = "0 2 * * *", timezone: str | None = "UTC",
                     name: str = "nightly-refresh", overrides=()):
    """The refresh flow as a Prefect deployment with one cron schedule (built locally, no server needed).

    Parameters
    ----------
    config_path : str or Path
        The TOML config; stored as an absolute path in the deployment's parameters.
    cron : str
        Five-field cron expression, read in ``timezone``.
    timezone : str or None
        IANA time zone name; None means UTC.
    name : str
        Deployment name (the deployment is ``graphkit-refresh/<name>``).
    overrides : sequence of str
        ``section.key=value`` config overrides passed to every run.

    Returns
    -------
    prefect.deployments.runner.RunnerDeployment

    Raises
    ------
    ConfigError
        A bad ``cron``, ``timezone`` or ``name`` (see :func:`check_schedule`).
    """
    check_schedule(cron, timezone, name)
    from prefect.schedules import Cron
    from prefect.types.entrypoint import EntrypointType

    from graphkit.flows.refresh import refresh_flow

    return refresh_flow.to_deployment(
        name=name, schedules=[Cron(cron, timezone=timezone)],
        parameters={"config_path": str(Path(config_path).resolve()), "overrides": list(overrides or [])},
        description="Nightly refresh of the node embeddings (graphkit schedule).", tags=["graphkit"],
        # the installed module, not a file path relative to wherever `graphkit schedule` was started
        entrypoint_type=EntrypointType.MODULE_PATH)


def next_run_dates(cron: str, timezone: str | None, n: int = 3, start: datetime | None = None) -> list[datetime]:
    """The next ``n`` run times of a cron schedule, as Prefect's scheduler computes them (aware datetimes)."""
    from prefect.server.schemas.schedules import CronSchedule

    return list(asyncio.run(CronSchedule(cron=cron, timezone=timezone).get_dates(n, start=start)))


def _api_url() -> str | None:
    from prefect.settings import get_current_settings

    return get_current_settings().api.url


def serve(*deployments, **kwargs) -> None:  # indirection so tests can stand in for serving forever
    from prefect import serve as prefect_serve

    prefect_serve(*deployments, **kwargs)


def serve_nightly(config_path, *, cron: str = "0 2 * * *", timezone: str | None = "UTC", name: str = "nightly-refresh",
                  overrides=()) -> None:
    """Serve the nightly deployment in this process until stopped; warns when no scheduler will fire it.

    At most one run at a time (the store lock would refuse a second one anyway). When serving stops, Prefect
    pauses the deployment's schedule; running ``graphkit schedule`` again resumes it.

    Raises
    ------
    ConfigError
        A bad ``cron``, ``timezone`` or ``name``, before anything is registered.
    """
    deployment = build_deployment(config_path, cron=cron, timezone=timezone, name=name, overrides=overrides)
    if not _api_url():
        print(NO_SCHEDULER_WARNING, file=sys.stderr)
    dates = ", ".join(d.isoformat(timespec="minutes") for d in next_run_dates(cron, timezone, 3))
    print(f"serving graphkit-refresh/{name}: cron {cron!r} in {timezone or 'UTC'}; next runs {dates}",
          file=sys.stderr)
    serve(deployment, limit=1)
