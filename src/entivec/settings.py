"""Where entivec keeps its state, the team settings file, and the environment defaults for Prefect and MLflow."""

from __future__ import annotations

import difflib
import os
from pathlib import Path

HOME_VARIABLE = "ENTIVEC_HOME"
SETTINGS_VARIABLE = "ENTIVEC_SETTINGS"
SETTINGS_FILE_NAME = "settings.env"
# What a settings file may set: where the shared servers are, and how to reach them.
SETTINGS_KEYS = (
    "ENTIVEC_HOME",
    "MLFLOW_TRACKING_URI",
    "MLFLOW_TRACKING_USERNAME",
    "MLFLOW_TRACKING_PASSWORD",
    "MLFLOW_TRACKING_TOKEN",
    "MLFLOW_TRACKING_SERVER_CERT_PATH",
    "PREFECT_API_URL",
    "PREFECT_API_KEY",
    "ENTIVEC_LIFECYCLE_LOCK",
)


class SettingsError(ValueError):
    """A settings file that cannot be used; the message names the file, the line and the key."""


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


def settings_file() -> Path | None:
    """The team settings file: ``ENTIVEC_SETTINGS`` when set (it must exist), else ``settings.env`` in the
    project folder when there is one, else None (the embedded defaults)."""
    named = os.environ.get(SETTINGS_VARIABLE)
    if named:
        path = Path(named).expanduser()
        if not path.is_file():
            raise SettingsError(f"{SETTINGS_VARIABLE}={named}: no such file")
        return path
    default = project_home() / SETTINGS_FILE_NAME
    return default if default.is_file() else None


def read_settings(path: Path) -> dict[str, str]:
    """``KEY=VALUE`` lines (``export`` allowed, ``#`` comments, optional quotes); unknown keys are errors."""
    values: dict[str, str] = {}
    for number, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        key, sep, value = line.partition("=")
        key = key.strip().removeprefix("export ").strip()
        if not sep or key not in SETTINGS_KEYS:
            close = difflib.get_close_matches(key, SETTINGS_KEYS, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise SettingsError(
                f"{path}, line {number}: {key!r} is not a setting{hint}; expected one of {', '.join(SETTINGS_KEYS)}"
            )
        values[key] = value.strip().strip("'\"")
    return values


def load_settings() -> Path | None:
    """Put the settings file's values into the environment where a variable is not already set (it wins)."""
    path = settings_file()
    if path is not None:
        for key, value in read_settings(path).items():
            if value:
                os.environ.setdefault(key, value)
    return path


def apply_environment_defaults() -> None:
    """Load the team settings file, then set (never override) what keeps the embedded services local and quiet.

    Called by the `entivec` command as it starts, never on import: importing a module must leave the process
    as it was. Prefect reads its settings when it is first imported, so a script calls this before that.
    """
    load_settings()
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
