"""The lifecycle end to end through the `entivec` command: real Prefect flows, a real SQLite MLflow store, and
versions trained on an open dataset; promotions at once from two processes; repair after a crash."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest

pytestmark = pytest.mark.integration

import entivec_test_lifecycle_support as support  # noqa: E402  (registered by conftest.py)

MODEL = support.MODEL
# Non-inferiority against production: an equally good retrain passes (not more than 5% worse), vectors
# trained on shuffled prices do not. One-hot and target-encoding context is left out to keep the test short.
POLICY = {"min_gain_over_production": -0.05, "compare_encodings": False}


def _prefect_artifact_keys() -> set[str]:
    from prefect.client.orchestration import get_client

    with get_client(sync_client=True) as client:
        return {a.key for a in client.read_artifacts() if a.key}


@pytest.mark.outside
def test_train_promote_refuse_force_rollback_history_diff_report(tmp_path, run_cli):
    from entivec.tasks.lifecycle import registry

    spec_path = support.write_spec(tmp_path / "data", support.diamonds(10_000, seed=5), POLICY)

    assert support.make_version(spec_path) == "1"
    code, out = run_cli(["promote", MODEL, "--reason", "first release", "--by", "ana"])
    assert code == 0, out
    assert "production of stone-prices is now version 1 (was no version)" in out
    assert registry.aliases_of(MODEL) == {"staging": "1", "production": "1"}

    assert support.make_version(spec_path, seed=3) == "2"
    code, out = run_cli(["promote", MODEL, "--reason", "June data", "--by", "ben", "--spec", spec_path])
    assert code == 0, out
    assert registry.aliases_of(MODEL)["production"] == "2"

    assert support.make_version(spec_path, shuffle_target=True) == "3"
    code, out = run_cli(["promote", MODEL, "--reason", "try the new one", "--by", "ben"])
    assert code == 1, out
    assert "the gate refused stone-prices version 3; production stays at version 2" in out
    assert "gain over production (version 2)" in out and "95% interval" in out  # which check, with figures
    assert registry.aliases_of(MODEL)["production"] == "2"

    code, out = run_cli(["promote", MODEL, "--version", "3", "--force", "--reason", "override for a test",
                         "--by", "cy"])
    assert code == 0, out
    assert "by force: the gate failed" in out
    assert registry.aliases_of(MODEL)["production"] == "3"
    # Each gate wrote version 3's review page again: the logged page carries both gates' verdicts.
    review_run = registry.client().get_model_version(MODEL, "3").run_id
    review_page = registry.run_file(review_run, "review/review.html").read_text(encoding="utf-8")
    assert "Gate of" in review_page and "FAIL" in review_page and "FORCED" in review_page

    code, out = run_cli(["rollback", MODEL, "--reason", "forced version misbehaves", "--by", "ana"])
    assert code == 0, out
    assert "back at version 2 (was version 3)" in out
    restored = registry.load_version(MODEL, "production").vector_set
    original = registry.load_version(MODEL, "2").vector_set
    for column in original.columns:  # exactly the earlier production's vectors and vocabulary
        np.testing.assert_array_equal(restored.vectors[column], original.vectors[column])
        assert restored.vocabularies[column].categories == original.vocabularies[column].categories

    code, out = run_cli(["rollback", MODEL, "--reason", "once more", "--by", "ana"])
    assert code == 0 and registry.aliases_of(MODEL)["production"] == "1", out
    code, out = run_cli(["rollback", MODEL, "--reason", "and again"])
    assert code == 2 and "no earlier version in the history" in out

    history_file = tmp_path / "history.json"
    code, out = run_cli(["history", MODEL, "--format", "json", "--out", history_file])
    assert code == 0, out
    entries = json.loads(history_file.read_text())
    expected = [
        ("train", "staging", None, "1"),
        ("promote", "production", None, "1"),
        ("train", "staging", "1", "2"),
        ("promote", "production", "1", "2"),
        ("train", "staging", "2", "3"),
        ("refused", "production", "2", "3"),
        ("forced_promote", "production", "2", "3"),
        ("rollback", "production", "3", "2"),
        ("rollback", "production", "2", "1"),
    ]
    assert [(e["event"], e["alias"], e["from_version"], e["to_version"]) for e in entries] == expected
    assert [e["by"] for e in entries[5:]] == ["ben", "cy", "ana", "ana"]
    assert [e["verdict"] for e in entries if e["alias"] == "production"] == [
        "pass", "pass", "fail", "forced", "n/a", "n/a"]
    assert entries[6]["reason"] == "override for a test"
    assert "gain over production (version 2)" in entries[6]["details"]["failed_checks"]
    gain = entries[1]["details"]["figures"]["gain_vs_baseline"]  # JSON: numbers, the interval as an object
    assert gain["value"] > 0 and gain["low"] <= gain["value"] <= gain["high"]
    fingerprint = registry.client().get_model_version(MODEL, "3").tags["entivec.data_fingerprint"]
    assert entries[6]["data_fingerprint"] == fingerprint and len(fingerprint) == 64
    evidence = registry.client().get_run(entries[6]["details"]["evidence_run"])
    assert evidence.data.tags["entivec.verdict"] == "forced"
    assert evidence.data.tags["mlflow.user"] == "cy"

    csv_file = tmp_path / "history.csv"
    assert run_cli(["history", MODEL, "--format", "csv", "--out", csv_file])[0] == 0
    table = pd.read_csv(csv_file)
    assert list(table["event"]) == [e[0] for e in expected] and list(table["seq"]) == list(range(1, 10))
    code, out = run_cli(["history", MODEL])
    assert code == 0 and "forced_promote" in out

    # The version report: train-run plots and the gate's evidence, embedded; logged to the train run.
    report_file = tmp_path / "v3.html"
    code, out = run_cli(["report", MODEL, "3", "--out", report_file])
    assert code == 0, out
    page = report_file.read_text()
    assert page.count("data:image/png;base64,") >= 2 and "FORCED" in page and "override for a test" in page
    assert "src=\"http" not in page and "href=\"http" not in page  # opens offline
    run_id = registry.client().get_model_version(MODEL, "3").run_id
    assert "report/version_report.html" in {a.path for a in registry.client().list_artifacts(run_id, "report")}
    assert {"stone-prices-v1-report", "stone-prices-v3-report", "stone-prices-gate-v3"} <= _prefect_artifact_keys()

    # Two versions side by side, with an HTML report that needs nothing but a browser.
    diff_file = tmp_path / "diff.html"
    code, out = run_cli(["diff", MODEL, "2", "3", "--html", diff_file, "--spec", spec_path])
    assert code == 0, out
    assert "clarity top movers:" in out and "overlap (chance)" in out and "same held-out rows" in out
    diff_page = diff_file.read_text()
    assert diff_page.count("data:image/png;base64,") >= 6  # an aligned map and a drift chart per column
    assert "after Procrustes alignment" not in out  # plots are in the HTML, not the terminal


def test_two_promotions_judged_at_once_only_one_applies(entivec_home, tmp_path):
    """Two processes each hold a passed gate against production version 1 and apply it at the same moment."""
    from entivec.tasks.lifecycle import audit, registry

    c = registry.client()
    run = c.create_run(registry.experiment_for(MODEL))
    c.create_registered_model(MODEL)
    for _ in range(3):
        c.create_model_version(MODEL, f"runs:/{run.info.run_id}/lookup_model", run_id=run.info.run_id)
    audit.record_move(MODEL, "production", "1", event="promote", reason="setup")

    # Both children import, then wait for each other at a barrier of files, then apply at the same moment.
    code = """
        import pathlib, sys, time
        import pandas as pd
        from entivec.tasks.lifecycle.audit import ConcurrentChange
        from entivec.tasks.lifecycle.gate import GateResult, apply_verdict
        result = GateResult(
            name={model!r}, candidate_version={candidate!r}, production_version="1", passed=True, checks=[],
            intervals={{}}, downstream=pd.DataFrame(), comparisons={{}}, production_expectations=[], rows=500,
            rows_note="", how="", primary_metric="rmse", data_fingerprint="f" * 64, policy={{}},
        )
        barrier = pathlib.Path({barrier!r})
        (barrier / "ready-{candidate}").touch()
        deadline = time.time() + 240
        while len(list(barrier.glob("ready-*"))) < 2 and time.time() < deadline:
            time.sleep(0.01)
        try:
            apply_verdict(result, by="p{candidate}", reason="race", forced=False, evidence_run="none",
                             candidate_fingerprint="")
        except ConcurrentChange as exc:
            print(exc)
            sys.exit(3)
    """
    children = [
        subprocess.Popen(
            [sys.executable, "-c", textwrap.dedent(code.format(model=MODEL, candidate=v, barrier=str(tmp_path)))],
            env=dict(os.environ), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        for v in ("2", "3")
    ]
    results = [(child.wait(timeout=300), child.stdout.read(), child.stderr.read()) for child in children]
    codes = sorted(r[0] for r in results)
    assert codes == [0, 3], results
    loser = next(r for r in results if r[0] == 3)
    assert "production of 'stone-prices' moved meanwhile" in loser[1]

    entries = audit.history(MODEL)
    promotions = [e for e in entries if e.event == "promote"]
    assert len(promotions) == 2 and promotions[1].from_version == "1"
    assert registry.aliases_of(MODEL)["production"] == promotions[1].to_version
    assert audit.replay(entries) == registry.aliases_of(MODEL)


def test_crash_during_rollback_is_repaired_by_the_next_command(run_cli, monkeypatch):
    from entivec.tasks.lifecycle import audit, registry

    c = registry.client()
    run = c.create_run(registry.experiment_for(MODEL))
    c.create_registered_model(MODEL)
    for _ in range(2):
        c.create_model_version(MODEL, f"runs:/{run.info.run_id}/lookup_model", run_id=run.info.run_id)
    audit.record_move(MODEL, "production", "1", event="promote", reason="one")
    audit.record_move(MODEL, "production", "2", event="promote", reason="two")

    def crash(point: str) -> None:
        if point == "after_move":
            raise RuntimeError("registry connection dropped")

    monkeypatch.setattr(audit, "_fault_hook", crash)
    code, out = run_cli(["rollback", MODEL, "--reason", "bad release", "--by", "eve"])
    assert code == 1 and "registry connection dropped" in out
    monkeypatch.setattr(audit, "_fault_hook", audit._no_fault)
    assert registry.aliases_of(MODEL)["production"] == "1"  # the alias moved, the record was left pending

    code, out = run_cli(["history", MODEL, "--format", "json"])
    assert code == 0, out
    last = json.loads(out)[-1]
    assert (last["event"], last["from_version"], last["to_version"], last["by"], last["state"]) == (
        "rollback", "2", "1", "eve", "repaired")


def test_command_line_input_is_checked(run_cli, tmp_path):
    from entivec.tasks.lifecycle import registry

    c = registry.client()
    c.create_registered_model(MODEL)

    code, out = run_cli(["promote", MODEL])
    assert code == 2 and "--reason" in out
    code, out = run_cli(["promote", MODEL, "--reason", "   "])
    assert code == 2 and "a reason is required" in out
    code, out = run_cli(["promote", "no such model", "--reason", "x"])
    assert code == 2 and "is not valid" in out
    code, out = run_cli(["promote", "unknown-model", "--reason", "x"])
    assert code == 2 and "no registered model named 'unknown-model'" in out
    code, out = run_cli(["promote", MODEL, "--reason", "x"])
    assert code == 2 and "has no alias 'staging'" in out
    code, out = run_cli(["promote", MODEL, "--version", "7", "--reason", "x"])
    assert code == 2 and "has no version 7" in out
    code, out = run_cli(["rollback", MODEL, "--reason", "x"])
    assert code == 2 and "has no production version" in out
    code, out = run_cli(["diff", MODEL, "production", "v2"])
    assert code == 2 and "has no alias 'production'" in out
    code, out = run_cli(["history", MODEL, "--format", "xml"])
    assert code == 2
