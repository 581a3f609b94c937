"""Tracking: one MLflow run holds a vector set with everything that made it; the run becomes a registered version."""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import socket
import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import yaml
from mlflow.entities import Metric, Param
from prefect import task
from prefect.cache_policies import NO_CACHE
from prefect.transactions import get_transaction

import entivec
from entivec.schemas.spec import Spec
from entivec.schemas.vector_set import VectorSet
from entivec.settings import project_home
from entivec.tasks.lifecycle import lineage, registry
from entivec.tasks.lifecycle.runlog import RUN_LOG_COLUMNS, run_log  # noqa: F401 - named here too
from entivec.tasks.lifecycle.stamps import now_iso, operator  # noqa: F401 - named here too

# The lookup model needs only these at serving time; naming them avoids MLflow's slow requirement inference.
LOOKUP_REQUIREMENTS = ["mlflow==3.17.2", "numpy", "pandas", "pyarrow"]
MAX_PARAM_LENGTH = 500
MODEL_ARTIFACT = "lookup_model"  # the registered pyfunc model's folder inside the train run
# Read by MLflow, never imported here: importing it would declare the model as a side effect.
# By path, not by importing the apply room: that would load torch into every command that only reads runs.
LOOKUP_MODEL_CODE = Path(__file__).parents[1] / "apply" / "lookup_model_entry.py"


def _flatten(prefix: str, value: Any, out: dict[str, str]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            _flatten(f"{prefix}.{key}" if prefix else str(key), inner, out)
    else:
        text = json.dumps(value) if isinstance(value, (list, bool)) or value is None else str(value)
        out[prefix] = text[:MAX_PARAM_LENGTH]


def spec_params(spec: Spec) -> dict[str, str]:
    """The spec as flat run parameters (rules and columns as JSON); the whole file is an artifact too."""
    out: dict[str, str] = {}
    _flatten("", spec.model_dump(mode="json"), out)
    return out


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def record_run(
    *,
    spec: Spec,
    bundle: Path,
    fingerprint: dict,
    ledger: dict,
    history: list[dict],
    metrics: dict[str, float],
    summary: str,
) -> str:
    """Log a finished train run: parameters, per-epoch and final metrics, tags, and the bundle as artifacts.

    ``bundle`` is a local folder laid out by the flow (spec, ledger, quarantine, vector_set/, network/,
    evidence/, plots/, summary.md). Returns the run id. A failure marks the run FAILED, never FINISHED.
    """
    c = registry.client()
    experiment_id = registry.experiment_for(spec.name)
    run = c.create_run(
        experiment_id,
        run_name=f"train {spec.name} {datetime.now(UTC):%Y-%m-%d %H:%M}",
        tags={
            "mlflow.user": operator(),
            "mlflow.source.name": "entivec train",
            f"{registry.TAG_PREFIX}kind": "train",
            f"{registry.TAG_PREFIX}data_fingerprint": fingerprint["sha256"],
            f"{registry.TAG_PREFIX}spec_hash": spec.content_hash(),
            f"{registry.TAG_PREFIX}code_version": entivec.__version__,
            # Lets a later command tell a run whose process died (left RUNNING by SIGKILL) from a live one.
            registry.RUN_OWNER_TAG: f"{socket.gethostname()} {os.getpid()}",
        },
    )
    run_id = run.info.run_id
    with registry.ending_run(c, run_id):
        params = [Param(k, v) for k, v in spec_params(spec).items()]
        for start in range(0, len(params), 90):
            c.log_batch(run_id, params=params[start : start + 90])
        stamp = int(datetime.now(UTC).timestamp() * 1000)
        series = [
            Metric(f"epoch_{key}", float(h[key]), stamp, int(h["epoch"]))
            for h in history
            for key in ("train_loss", "valid_loss", "rows_per_second")
            if _finite(h.get(key))
        ]
        finals = [Metric(k, float(v), stamp, 0) for k, v in metrics.items() if _finite(v)]
        counts = [
            Metric(f"rows_{k}", float(ledger[k]), stamp, 0) for k in ("rows_in", "rows_used", "rows_quarantined")
        ]
        everything = series + finals + counts
        for start in range(0, len(everything), 900):
            c.log_batch(run_id, metrics=everything[start : start + 900])
        c.set_tag(run_id, "mlflow.note.content", summary)
        lineage.log_data_input(c, run_id, spec.source.path, fingerprint, spec.name, "training")
        c.log_artifacts(run_id, str(bundle))
    return run_id


def register_version(
    *, spec: Spec, run_id: str, vector_set_folder: Path, version_tags: dict[str, str]
) -> str:
    """Register the run's vector set as a new version of ``spec.name`` (as a pyfunc lookup model), intent first.

    The lookup model is saved locally and logged into the run with the client, then the version is created
    already tagged ``registering`` with all its tags in one call (``registry.create_version``); the flow marks
    it complete once the alias and the history entry are written. No process-wide MLflow URI is set.
    """
    import mlflow.pyfunc

    from entivec.tasks.apply.served import example_warnings_quiet, input_example_for, signature_for

    vector_set = VectorSet.load(vector_set_folder)
    c = registry.client()
    project_home().mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="model-", dir=project_home()) as scratch:
        model_dir = Path(scratch) / MODEL_ARTIFACT
        with example_warnings_quiet():
            mlflow.pyfunc.save_model(
                path=str(model_dir),
                # Models from code: MLflow stores this file and runs it at load time, so nothing is pickled.
                python_model=str(LOOKUP_MODEL_CODE),
                artifacts={registry.VECTOR_SET_ARTIFACT: str(vector_set_folder)},
                signature=signature_for(vector_set),
                input_example=input_example_for(vector_set),
                pip_requirements=LOOKUP_REQUIREMENTS,
            )
        c.log_artifacts(run_id, str(model_dir), MODEL_ARTIFACT)
    source = f"{c.get_run(run_id).info.artifact_uri.rstrip('/')}/{MODEL_ARTIFACT}"
    version = registry.create_version(spec.name, source=source, run_id=run_id, tags=version_tags)
    lineage.describe(c, spec.name, version, spec.description)
    return version


@task(name="record-run", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def record_run_task(**kwargs) -> str:
    return record_run(**kwargs)


@task(name="register-version", cache_policy=NO_CACHE)
def register_version_task(*, spec: Spec, run_id: str, vector_set_folder: Path, version_tags: dict[str, str]) -> str:
    version = register_version(
        spec=spec, run_id=run_id, vector_set_folder=vector_set_folder, version_tags=version_tags
    )
    transaction = get_transaction()
    if transaction is not None:  # what the rollback hook needs to undo this step
        transaction.set("name", spec.name)
        transaction.set("version", version)
    return version


@register_version_task.on_rollback
def _unregister(transaction) -> None:
    """Undo a registration whose later steps failed: no half-registered version stays behind.

    When the store itself is gone the version stays tagged ``registering``; the next lifecycle command
    removes it and records that in the history.
    """
    version = transaction.get("version", None)
    name = transaction.get("name", None)
    if version and name:
        try:
            registry.client().delete_model_version(name, version)
        except registry.RegistryUnavailable:
            pass


@task(name="complete-version", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def complete_version_task(name: str, version: str) -> None:
    registry.mark_complete(name, version)


def write_spec_copy(spec: Spec, source_text: str | None, folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    if source_text is not None:
        (folder / "spec.yaml").write_text(source_text, encoding="utf-8")
    (folder / "spec.resolved.yaml").write_text(
        yaml.safe_dump(spec.model_dump(mode="json"), sort_keys=False), encoding="utf-8"
    )


def copy_into(src: Path, dst: Path) -> None:
    dst.parent.mkdir(parents=True, exist_ok=True)
    shutil.copy2(src, dst)


# --- Prefect artifacts ----------------------------------------------------------------------------------------


def prefect_key(text: str) -> str:
    """A Prefect artifact key: lowercase letters, digits and dashes only."""
    return re.sub(r"-+", "-", re.sub(r"[^a-z0-9-]", "-", text.lower())).strip("-")[:200] or "entivec"


def link_in_prefect(key: str, link: str, link_text: str, description: str) -> None:
    """A link artifact in the current Prefect flow or task run; outside a run there is nowhere to attach it."""
    from prefect.artifacts import create_link_artifact
    from prefect.context import FlowRunContext, TaskRunContext

    if FlowRunContext.get() is None and TaskRunContext.get() is None:
        return
    create_link_artifact(link=link, link_text=link_text, key=prefect_key(key), description=description)


def markdown_in_prefect(key: str, text: str, description: str) -> None:
    from prefect.artifacts import create_markdown_artifact
    from prefect.context import FlowRunContext, TaskRunContext

    if FlowRunContext.get() is None and TaskRunContext.get() is None:
        return
    create_markdown_artifact(markdown=text, key=prefect_key(key), description=description)
