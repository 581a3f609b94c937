"""Train runs that train nothing: a retrain stopped by drift, or input the latest version already trained on.

Both are recorded as MLflow runs of the model's experiment tagged ``entivec.kind`` = ``train-stopped`` or
``train-skipped`` (a stopped run holds the drift report). They never touch the registry: no version, no alias move.
"""

from __future__ import annotations

import os
import socket
import tempfile
from datetime import UTC, datetime
from pathlib import Path

from mlflow.entities.model_registry import ModelVersion
from prefect import task
from prefect.cache_policies import NO_CACHE

import entivec
from entivec.schemas.spec import Spec
from entivec.settings import project_home
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.drift import REPORT_FOLDER, DriftReport, write_report
from entivec.tasks.lifecycle.track import operator

STOPPED_KIND = "train-stopped"
SKIPPED_KIND = "train-skipped"



def record_outcome_run(spec: Spec, kind: str, fingerprint_sha: str, note: str, tags: dict[str, str],
                       report: DriftReport | None = None) -> str:
    """An MLflow run in the model's experiment that records why nothing was trained; returns its id."""
    c = registry.client()
    run = c.create_run(
        registry.experiment_for(spec.name),
        run_name=f"{kind} {spec.name} {datetime.now(UTC):%Y-%m-%d %H:%M}",
        tags={
            "mlflow.user": operator(),
            "mlflow.source.name": "entivec train",
            "mlflow.note.content": note,
            f"{registry.TAG_PREFIX}kind": kind,
            f"{registry.TAG_PREFIX}data_fingerprint": fingerprint_sha,
            f"{registry.TAG_PREFIX}spec_hash": spec.content_hash(),
            f"{registry.TAG_PREFIX}code_version": entivec.__version__,
            registry.RUN_OWNER_TAG: f"{socket.gethostname()} {os.getpid()}",  # ended KILLED if its process dies
            **{k: v[:4900] for k, v in tags.items()},
        },
    )
    run_id = run.info.run_id
    with registry.ending_run(c, run_id):
        if report is not None:
            project_home().mkdir(parents=True, exist_ok=True)
            with tempfile.TemporaryDirectory(prefix="drift-", dir=project_home()) as scratch:
                c.log_artifacts(run_id, str(write_report(report, Path(scratch))), REPORT_FOLDER)
            c.log_metric(run_id, "drift_max_psi", report.largest("psi"))
            c.log_metric(run_id, "drift_max_new_category_share", report.largest("new_category_share"))
    return run_id


@task(name="record-drift-stop", cache_policy=NO_CACHE)
def record_stop_task(spec: Spec, report: DriftReport, fingerprint_sha: str) -> str:
    """Record a retrain stopped by drift (no retries: a second record would be a second run)."""
    return record_outcome_run(
        spec, STOPPED_KIND, fingerprint_sha, report.stop_message(),
        {f"{registry.TAG_PREFIX}stop_reason": "; ".join(report.breaches),
         f"{registry.TAG_PREFIX}against_version": report.against_version},
        report,
    )


def latest_same_input(name: str, fingerprint_sha: str, spec_hash: str) -> ModelVersion | None:
    """The latest registered version when it was trained on this very data with this spec, else None."""
    if registry.find_model(name) is None:
        return None  # nothing registered yet; a store that cannot be read raises instead
    versions = [v for v in registry.list_versions(name) if not registry.is_incomplete(v)]
    if not versions:
        return None
    tags = versions[0].tags or {}
    same = (tags.get(f"{registry.TAG_PREFIX}data_fingerprint") == fingerprint_sha
            and tags.get(f"{registry.TAG_PREFIX}spec_hash") == spec_hash)
    return versions[0] if same else None


@task(name="latest-same-input", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def latest_same_input_task(name: str, fingerprint_sha: str, spec_hash: str) -> ModelVersion | None:
    return latest_same_input(name, fingerprint_sha, spec_hash)


@task(name="record-no-new-data", cache_policy=NO_CACHE)
def record_skip_task(spec: Spec, version: str, fingerprint_sha: str) -> str:
    note = (f"no new data: the latest version of {spec.name} (version {version}) was trained on this very data "
            "(same data fingerprint) with this spec (same spec hash); nothing was trained")
    return record_outcome_run(spec, SKIPPED_KIND, fingerprint_sha, note,
                              {f"{registry.TAG_PREFIX}same_as_version": str(version)})
