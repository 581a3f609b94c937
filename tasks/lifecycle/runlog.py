"""The run log of a model: every run of its experiment, newest first (``entivec runs``).

Apart from ``track`` so that reading it loads neither Prefect nor MLflow: with a SQLite store the read commands
answer from the file (``direct``).
"""

from __future__ import annotations

from datetime import UTC, datetime

import pandas as pd

from entivec.tasks.lifecycle import registry

RUN_LOG_COLUMNS = ["started", "kind", "status", "version", "verdict", "data_fingerprint", "user", "run_id", "note"]


def run_log(name: str, limit: int = 50) -> pd.DataFrame:
    """The runs of a model's experiment, newest first: trains, skips ("no new data"), drift stops, gates, sweeps.

    ``version`` is the registered version a train run became, or the candidate a gate run judged (``verdict``
    pass, fail or forced). ``note`` is the first line of the run's
    note (its summary, or the reason nothing was trained). Versions tell what was made; this tells what was
    attempted, which is where a scheduled run that trained nothing leaves its trace.
    """
    c = registry.client()
    registry.check_name(name)
    experiment = c.get_experiment_by_name(f"entivec/{name}")
    if experiment is None:
        registry.list_versions(name)  # no runs and no model: an error that names the known models
        return pd.DataFrame(columns=RUN_LOG_COLUMNS)
    by_run = {v.run_id: str(v.version) for v in c.search_model_versions(f"name = '{name}'")}
    runs = c.search_runs([experiment.experiment_id], order_by=["attributes.start_time DESC"], max_results=limit)
    rows = []
    for run in runs:
        tags = run.data.tags
        note = tags.get("mlflow.note.content") or tags.get(f"{registry.TAG_PREFIX}reason", "")
        rows.append({
            "started": datetime.fromtimestamp(run.info.start_time / 1000, UTC).isoformat(timespec="seconds"),
            "kind": tags.get(f"{registry.TAG_PREFIX}kind", ""),
            "status": run.info.status,
            # A gate run judged a candidate: its version and verdict are in the run's tags.
            "version": by_run.get(run.info.run_id, tags.get(f"{registry.TAG_PREFIX}candidate_version", "")),
            "verdict": tags.get(f"{registry.TAG_PREFIX}verdict", ""),
            "data_fingerprint": tags.get(f"{registry.TAG_PREFIX}data_fingerprint", "")[:12],
            "user": tags.get("mlflow.user", ""),
            "run_id": run.info.run_id,
            "note": next((line.strip() for line in note.splitlines() if line.strip()), ""),
        })
    return pd.DataFrame(rows, columns=RUN_LOG_COLUMNS)
