"""Where entivec keeps its state, and the environment defaults for the embedded Prefect and MLflow."""

from __future__ import annotations

import os
from pathlib import Path

HOME_VARIABLE = "ENTIVEC_HOME"


def project_home() -> Path:
    """The project folder that holds the embedded tracking store, Prefect's state and outputs.

    ``ENTIVEC_HOME`` when set, else ``.entivec`` in the working directory.
    """
    return Path(os.environ.get(HOME_VARIABLE, ".entivec")).resolve()


def tracking_uri() -> str:
    """MLflow tracking URI: ``MLFLOW_TRACKING_URI`` when set, else a SQLite store in the project folder."""
    configured = os.environ.get("MLFLOW_TRACKING_URI")
    if configured:
        return configured
    return f"sqlite:///{project_home() / 'mlflow.db'}"


def artifact_root() -> str:
    """Where a new MLflow experiment keeps its artifacts when the store is the embedded one."""
    return (project_home() / "artifacts").as_uri()


def apply_environment_defaults() -> None:
    """Set (never override) the variables that keep the embedded services local, quiet and private."""
    home = project_home()
    defaults = {
        "PREFECT_HOME": str(home / "prefect"),
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
        "PREFECT_LOGGING_LEVEL": "WARNING",
        "MLFLOW_DISABLE_TELEMETRY": "true",
        "DO_NOT_TRACK": "true",
        "GIT_PYTHON_REFRESH": "quiet",
    }
    for key, value in defaults.items():
        os.environ.setdefault(key, value)
    # The temporary Prefect server keeps a SQLite file here and cannot create the folder itself.
    Path(os.environ["PREFECT_HOME"]).expanduser().mkdir(parents=True, exist_ok=True)
