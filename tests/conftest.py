"""Test-session set-up: private Prefect and MLflow state, quiet services, one Prefect test server per session."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

# Before anything imports prefect or mlflow: all state of this test session lives in one temporary folder.
_SESSION_HOME = Path(tempfile.mkdtemp(prefix="entivec-tests-"))
os.environ["ENTIVEC_HOME"] = str(_SESSION_HOME)
os.environ["PREFECT_HOME"] = str(_SESSION_HOME / "prefect")
os.environ.pop("PREFECT_API_URL", None)
os.environ.pop("MLFLOW_TRACKING_URI", None)
os.environ.pop("MLFLOW_REGISTRY_URI", None)
os.environ.pop("ENTIVEC_SETTINGS", None)  # a developer's team settings must never point the tests at real servers
os.environ.pop("ENTIVEC_DASK_ADDRESS", None)
for key, value in {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
    "PREFECT_LOGGING_LEVEL": "WARNING",
    "MLFLOW_DISABLE_TELEMETRY": "true",
    "DO_NOT_TRACK": "true",
}.items():
    os.environ[key] = value

import pytest  # noqa: E402


def _register_support_module(name: str, filename: str) -> None:
    """Load a shared helper file of the tests once, importable by name (no tests/__init__.py here)."""
    import importlib.util
    import sys

    spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name(filename))
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)


_register_support_module("entivec_test_vector_fixtures", "vector_fixtures.py")
_register_support_module("entivec_test_lifecycle_support", "lifecycle_support.py")
_register_support_module("entivec_test_browser_support", "browser_support.py")


# What the markers in pyproject.toml promise, applied by what a test uses (checked by tests/test_markers.py):
# a test that gets the Prefect test server runs real flows (integration); one that gets the team stack starts
# real servers (services, and integration too).
FLOW_FIXTURES = frozenset({"prefect_server"})
SERVICE_FIXTURES = frozenset({"stack"})


@pytest.hookimpl(tryfirst=True)  # before pytest's own -m selection runs
def pytest_collection_modifyitems(config, items):
    for item in items:
        used = set(getattr(item, "fixturenames", ()))
        if used & SERVICE_FIXTURES and item.get_closest_marker("services") is None:
            item.add_marker(pytest.mark.services)
        if (used & (FLOW_FIXTURES | SERVICE_FIXTURES) or item.get_closest_marker("services")) and \
                item.get_closest_marker("integration") is None:
            item.add_marker(pytest.mark.integration)


@pytest.fixture(scope="session")
def prefect_server():
    """One temporary Prefect server for every test that runs a real flow."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=90):
        yield


@pytest.fixture(scope="session")
def empty_store() -> Path:
    """An MLflow SQLite store with its tables created once: creating them takes seconds, copying it does not."""
    import mlflow
    from mlflow.tracking import MlflowClient

    path = _SESSION_HOME / "template" / "mlflow.db"
    path.parent.mkdir(parents=True)
    MlflowClient(tracking_uri=f"sqlite:///{path}").search_experiments()
    mlflow.set_tracking_uri(None)
    return path


@pytest.fixture
def entivec_home(tmp_path, monkeypatch, empty_store):
    """A fresh project folder with its own SQLite MLflow store, for tests that register versions."""
    import shutil

    home = tmp_path / "home"
    home.mkdir()
    shutil.copy(empty_store, home / "mlflow.db")
    monkeypatch.setenv("ENTIVEC_HOME", str(home))
    # mlflow.set_tracking_uri/set_registry_uri export these; a stale one would point at the previous store.
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.delenv("MLFLOW_REGISTRY_URI", raising=False)
    return home


@pytest.fixture
def run_cli(entivec_home, prefect_server):
    """Run the `entivec` command in-process; returns (exit code, everything it printed)."""
    from typer.testing import CliRunner

    from entivec.cli import app

    def run(args: list[str]) -> tuple[int, str]:
        result = CliRunner().invoke(app, [str(a) for a in args])
        return result.exit_code, result.output

    return run


@pytest.fixture
def registered_versions(entivec_home):
    """How many versions of a model the test's store holds (0 when the model does not exist)."""

    def count(name: str) -> int:
        from entivec.tasks.lifecycle import registry

        return len(registry.client().search_model_versions(f"name = '{name}'"))

    return count
