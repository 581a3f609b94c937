"""Scheduled retraining: a flow that trains and then promotes through the gate, and registering deployments of it."""

from __future__ import annotations

import contextlib
import difflib
import inspect
import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml
from prefect import flow, get_run_logger

from entivec.flows import parallel
from entivec.flows.lifecycle import GateRefused, promote
from entivec.flows.train import train
from entivec.schemas.spec import SpecError

NO_NEW_DATA = "no-new-data"
SCHEDULER = "scheduler"  # the `by` of an alias move a scheduled run makes, unless the deployment names one


@dataclass
class ScheduledOutcome:
    """What one scheduled run did: ``status`` is no-new-data, promoted or refused."""

    name: str
    status: str
    version: str | None
    production: str | None
    message: str
    failed_checks: list[str] = field(default_factory=list)


@flow(name="train-and-promote", flow_run_name="train and promote {spec_path}", validate_parameters=False)
def train_and_promote(
    spec_path: str,
    vocabulary_from: str | None = None,
    source: str | None = None,
    incremental: bool = False,
    warm_start: bool = False,
    skip_unchanged: bool = True,
    reason: str | None = None,
    by: str | None = None,
    dask: str | None = None,
    workers: int = parallel.DEFAULT_WORKERS,
) -> ScheduledOutcome:
    """Train from the spec (as `entivec train` does), then judge the new version and promote it if the gate passes.

    When the train step reports no new data, nothing further happens. A refused gate leaves `production` where
    it was; the refusal, with its figures, is in the model's history and this run's result says so. The gate
    reads its held-out rows through ``spec_path``, from ``source`` when given (the same drop the train step read).
    ``dask`` ("local" or a scheduler address; default ENTIVEC_DASK_ADDRESS) runs the train step's independent
    networks on Dask, with ``workers`` processes for a local cluster.
    """
    logger = get_run_logger()
    # The train step on Dask when ``dask`` (or ENTIVEC_DASK_ADDRESS on the worker) names a cluster.
    runner = parallel.task_runner(dask, workers=workers)
    train_step = train.with_options(task_runner=runner) if runner is not None else train
    with parallel.prefect_api_for_workers(runner):
        outcome = train_step(spec_path, vocabulary_from=vocabulary_from, source=source, incremental=incremental,
                             warm_start=warm_start, skip_unchanged=skip_unchanged)
    if outcome.status == NO_NEW_DATA:
        message = f"{outcome.name}: no new data since the last version; nothing trained, nothing promoted"
        logger.info(message)
        return ScheduledOutcome(outcome.name, NO_NEW_DATA, None, None, message)
    why = reason or f"scheduled retrain from {spec_path}"
    try:
        promoted = promote(outcome.name, why, version=outcome.version, spec_path=spec_path, by=by or SCHEDULER,
                           source=source)
    except GateRefused as refused:
        result = refused.outcome
        message = (f"{outcome.name} version {outcome.version} stays at staging: the gate refused it; production "
                   f"stays at {'version ' + result.previous_production if result.previous_production else 'none'}")
        logger.warning("%s\n%s", message, "\n".join(result.failed))
        return ScheduledOutcome(outcome.name, "refused", outcome.version, result.previous_production, message,
                                list(result.failed))
    message = f"{outcome.name} version {outcome.version} is production (was {promoted.previous_production or 'none'})"
    logger.info(message)
    return ScheduledOutcome(outcome.name, "promoted", outcome.version, outcome.version, message)


# --- deployments ------------------------------------------------------------------------------------------------

# The flows a deployment may run, by the name used in the deployments file: (file beside this one, function).
FLOWS = {"train": ("train.py", "train"), "train-and-promote": ("scheduled.py", "train_and_promote")}
FILE_KEYS = ("work_pool", "deployments")
DEPLOYMENT_KEYS = ("name", "flow", "cron", "timezone", "parameters", "description", "paused", "tags",
                   "concurrency_limit")
PATH_PARAMETERS = ("spec_path", "source")  # made absolute: the worker runs in another folder


@dataclass
class DeploymentPlan:
    name: str
    flow: str
    cron: str
    timezone: str
    parameters: dict[str, Any]
    description: str
    paused: bool
    tags: list[str]
    concurrency_limit: int | None

    @property
    def full_name(self) -> str:
        return f"{self.flow}/{self.name}"


def _check_keys(where: str, found: dict, allowed: tuple[str, ...]) -> None:
    for key in found:
        if key not in allowed:
            close = difflib.get_close_matches(str(key), allowed, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise SpecError(f"{where}: unknown key {key!r}{hint}; expected one of {', '.join(allowed)}")


def _flow_object(flow_name: str):
    return {"train": train, "train-and-promote": train_and_promote}[flow_name]


def read_deployments(path: str | Path) -> tuple[str | None, list[DeploymentPlan]]:
    """Read and check a deployments file: (work pool or None, the deployments). Errors name the file and key."""
    from prefect.schedules import Cron

    file = Path(path)
    try:
        document = yaml.safe_load(file.read_text(encoding="utf-8")) or {}
    except OSError as exc:
        raise SpecError(f"{file}: cannot read the deployments file ({exc.strerror})") from None
    except yaml.YAMLError as exc:
        raise SpecError(f"{file}: not valid YAML ({exc})") from None
    if not isinstance(document, dict):
        raise SpecError(f"{file}: expected a mapping with keys {', '.join(FILE_KEYS)}")
    _check_keys(str(file), document, FILE_KEYS)
    entries = document.get("deployments")
    if not isinstance(entries, list) or not entries:
        raise SpecError(f"{file}: 'deployments' must be a non-empty list")
    plans: list[DeploymentPlan] = []
    for index, entry in enumerate(entries):
        where = f"{file}, deployments[{index}]"
        if not isinstance(entry, dict):
            raise SpecError(f"{where}: expected a mapping")
        _check_keys(where, entry, DEPLOYMENT_KEYS)
        for required in ("name", "flow", "cron", "parameters"):
            if not entry.get(required):
                raise SpecError(f"{where}: {required!r} is required")
        if entry["flow"] not in FLOWS:
            raise SpecError(f"{where}, flow: {entry['flow']!r} is not one of {', '.join(FLOWS)}")
        try:
            Cron(str(entry["cron"]), timezone=str(entry.get("timezone") or "UTC"))
        except (ValueError, TypeError) as exc:
            raise SpecError(f"{where}, cron: {entry['cron']!r} is not a valid cron schedule ({exc})") from None
        parameters = dict(entry["parameters"])
        accepted = tuple(inspect.signature(_flow_object(entry["flow"]).fn).parameters)
        _check_keys(f"{where}, parameters (of flow {entry['flow']})", parameters, accepted)
        if "spec_path" not in parameters:
            raise SpecError(f"{where}, parameters: 'spec_path' is required")
        for key in PATH_PARAMETERS:
            if parameters.get(key):
                value = Path(str(parameters[key])).expanduser()
                parameters[key] = str(value if value.is_absolute() else (file.parent / value).resolve())
        plans.append(DeploymentPlan(
            name=str(entry["name"]), flow=entry["flow"], cron=str(entry["cron"]),
            timezone=str(entry.get("timezone") or "UTC"), parameters=parameters,
            description=str(entry.get("description") or ""), paused=bool(entry.get("paused", False)),
            tags=[str(t) for t in entry.get("tags") or []],
            concurrency_limit=int(entry["concurrency_limit"]) if entry.get("concurrency_limit") else None,
        ))
    names = [p.full_name for p in plans]
    duplicated = sorted({n for n in names if names.count(n) > 1})
    if duplicated:
        raise SpecError(f"{file}: deployment names must be unique per flow; repeated: {', '.join(duplicated)}")
    return document.get("work_pool"), plans


def _ensure_process_pool(name: str) -> None:
    """Create the process work pool when it is missing; an existing pool keeps its settings."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.actions import WorkPoolCreate
    from prefect.exceptions import ObjectNotFound
    from prefect.workers.process import ProcessWorker

    with get_client(sync_client=True) as client:
        try:
            pool = client.read_work_pool(name)
        except ObjectNotFound:
            client.create_work_pool(WorkPoolCreate(
                name=name, type="process", base_job_template=ProcessWorker.get_default_base_job_template()))
            return
    if pool.type != "process":
        raise SpecError(f"work pool {name!r} is of type {pool.type!r}; these deployments need a process pool")


def register_deployments(path: str | Path, work_pool: str | None = None) -> list[tuple[DeploymentPlan, str]]:
    """Create or update each deployment of the file on the Prefect server PREFECT_API_URL names.

    The deployments run the flows from this installed copy of entivec (its folder is the working directory of
    each run), on a process work pool: a worker started on a machine with the same installation runs them.
    """
    from prefect import Flow
    from prefect.schedules import Cron
    from prefect.settings import PREFECT_API_URL

    if not PREFECT_API_URL.value():
        raise SpecError("PREFECT_API_URL is not set: deployments need a Prefect server (start one with "
                        "`infra/stack up`, then `eval \"$(infra/stack env)\"`)")
    file_pool, plans = read_deployments(path)
    pool = work_pool or file_pool
    if not pool:
        raise SpecError(f"{path}: no work pool: set 'work_pool' in the file or pass --work-pool")
    _ensure_process_pool(pool)
    flows_folder = Path(__file__).resolve().parent
    registered = []
    for plan in plans:
        script, function = FLOWS[plan.flow]
        deployable = Flow.from_source(source=str(flows_folder.parent),
                                      entrypoint=f"{flows_folder.name}/{script}:{function}")
        # One deployment per call, so a failure raises; Prefect's own progress table is not shown (the CLI
        # prints one table for the whole file).
        with contextlib.redirect_stdout(io.StringIO()):
            deployment_id = deployable.deploy(
                name=plan.name, work_pool_name=pool, schedules=[Cron(plan.cron, timezone=plan.timezone)],
                parameters=plan.parameters, description=plan.description or None, paused=plan.paused,
                tags=plan.tags or None, concurrency_limit=plan.concurrency_limit, build=False, push=False,
                print_next_steps=False, ignore_warnings=True,
            )
        registered.append((plan, str(deployment_id)))
    return registered
