"""The `entivec schedule` commands: check a deployments file and register its deployments on a Prefect server."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

schedule_app = typer.Typer(
    name="schedule", help="Scheduled retraining: deployments of the train flows on a Prefect server.",
    no_args_is_help=True,
)
FILE_HELP = "Deployments file (YAML), e.g. infra/deployments.yaml."


def _table(plans) -> Table:
    table = Table(title="deployments")
    for header in ("deployment", "cron", "timezone", "parameters", "paused"):
        table.add_column(header)
    for plan in plans:
        parameters = ", ".join(f"{k}={v}" for k, v in plan.parameters.items())
        table.add_row(plan.full_name, plan.cron, plan.timezone, parameters, "yes" if plan.paused else "no")
    return table


@schedule_app.command("check")
def check(file: Annotated[Path, typer.Option("--file", help=FILE_HELP)]) -> None:
    """Read a deployments file and check it against the flows' parameters, without a server."""
    from entivec.cli import _run, console
    from entivec.flows.scheduled import read_deployments

    pool, plans = _run(lambda: read_deployments(file))
    console.print(_table(plans))
    console.print(f"{len(plans)} deployment(s), work pool {pool or '(not set: pass --work-pool to register)'}")


@schedule_app.command("register")
def register_command(
    file: Annotated[Path, typer.Option("--file", help=FILE_HELP)],
    work_pool: Annotated[
        str | None, typer.Option(help="Process work pool to run them on (default: the file's work_pool).")
    ] = None,
) -> None:
    """Create or update the file's deployments on the Prefect server PREFECT_API_URL names."""
    from entivec.cli import _run, console
    from entivec.flows.scheduled import register_deployments

    registered = _run(lambda: register_deployments(file, work_pool=work_pool))
    console.print(_table([plan for plan, _ in registered]))
    console.print(f"registered {len(registered)} deployment(s); a worker on the pool runs them "
                  "(`prefect deployment run FLOW/NAME` starts one now)")


def register(app: typer.Typer) -> None:
    """Add the `schedule` command group to the `entivec` application."""
    app.add_typer(schedule_app)
