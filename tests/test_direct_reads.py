"""The direct reads of the SQLite tracking store against MLflow's own client on the same store.

Reference: MLflow's ``MlflowClient`` (the library that writes the store) answers every read here first; the direct
reader (``tasks/lifecycle/direct.py``) must give the same answer, or step aside (``NotDirect``) so MLflow answers.
The store is written by MLflow itself in each test: models, versions (one deleted), aliases, tags, runs of
every status with params, metrics (a NaN among them) and tags, and local artifacts.
"""

from __future__ import annotations

import math
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

NAME = "parcel-depots"


@pytest.fixture
def store(entivec_home, tmp_path):
    """A store written through MlflowClient; returns (client, reader, run ids by label)."""
    from mlflow.tracking import MlflowClient

    from entivec.settings import tracking_uri
    from entivec.tasks.lifecycle import direct, registry

    uri = tracking_uri()
    c = MlflowClient(tracking_uri=uri, registry_uri=uri)
    experiment_id = registry.experiment_for(NAME)
    other_experiment = registry.experiment_for("other-model")
    runs = {}
    for label, status in (("first", "FINISHED"), ("second", "FINISHED"), ("gate", "FINISHED"),
                          ("stopped", "KILLED"), ("live", "RUNNING"), ("broken", "FAILED")):
        run = c.create_run(experiment_id, run_name=f"run {label}",
                           tags={"entivec.kind": "gate" if label == "gate" else "train", "mlflow.user": "tester"})
        runs[label] = run.info.run_id
        c.log_param(run.info.run_id, "rows", "1200")
        c.log_metric(run.info.run_id, "rmse", 1.5, step=0)
        c.log_metric(run.info.run_id, "rmse", 1.25, step=1)  # the latest value is what a run shows
        c.log_metric(run.info.run_id, "gain", float("nan"))
        if label == "gate":
            c.set_tag(run.info.run_id, "entivec.candidate_version", "2")
        if status != "RUNNING":
            c.set_terminated(run.info.run_id, status=status)
        time.sleep(0.01)  # distinct start times: the order is by start time
    c.create_run(other_experiment, run_name="another model's run")
    artifacts = tmp_path / "artifacts"
    (artifacts / "plots").mkdir(parents=True)
    (artifacts / "summary.md").write_text("# a summary\n", encoding="utf-8")
    (artifacts / "plots" / "map.png").write_bytes(b"\x89PNG not really")
    c.log_artifacts(runs["first"], str(artifacts), "bundle")

    c.create_registered_model(NAME, tags={"team": "routing"}, description="invented depots")
    c.create_registered_model("other-model")
    for label in ("first", "second", "stopped"):
        c.create_model_version(NAME, f"runs:/{runs[label]}/bundle", run_id=runs[label],
                               tags={"entivec.state": "complete", "from": label})
    c.delete_model_version(NAME, "3")  # kept by MLflow as a row marked deleted
    c.set_registered_model_alias(NAME, "production", "1")
    c.set_registered_model_alias(NAME, "staging", "2")
    reader = direct.DirectReader(direct.sqlite_path(uri))
    yield c, reader, runs
    reader.close()


def _version(mv) -> tuple:
    return (mv.name, int(mv.version), mv.creation_timestamp, mv.last_updated_timestamp, mv.description, mv.source,
            mv.run_id, mv.status, dict(mv.tags), sorted(mv.aliases))


def _run(run) -> tuple:
    info, data = run.info, run.data
    metrics = {k: ("nan" if math.isnan(v) else v) for k, v in data.metrics.items()}
    return (info.run_id, info.run_name, str(info.experiment_id), info.status, info.start_time, info.end_time,
            info.lifecycle_stage, info.artifact_uri, metrics, dict(data.params), dict(data.tags))


def test_models_and_versions_read_as_mlflow_reads_them(store):
    c, reader, _ = store
    want, got = c.get_registered_model(NAME), reader.get_registered_model(NAME)
    assert (got.name, got.description, got.tags, got.creation_timestamp) == \
        (want.name, want.description, want.tags, want.creation_timestamp)
    assert {a: int(v) for a, v in got.aliases.items()} == {a: int(v) for a, v in want.aliases.items()}
    assert sorted(m.name for m in reader.search_registered_models()) == \
        sorted(m.name for m in c.search_registered_models())
    for number in ("1", "2"):
        assert _version(reader.get_model_version(NAME, number)) == _version(c.get_model_version(NAME, number))
    for alias in ("production", "staging"):
        assert _version(reader.get_model_version_by_alias(NAME, alias)) == \
            _version(c.get_model_version_by_alias(NAME, alias))
    listed = sorted(map(_version, reader.search_model_versions(f"name = '{NAME}'")))
    assert listed == sorted(map(_version, c.search_model_versions(f"name = '{NAME}'")))
    assert [v[1] for v in listed] == [1, 2]  # the deleted version 3 is left out, as MLflow leaves it out


def test_not_found_is_the_same_answer_through_the_registry(store, monkeypatch):
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle import store as store_module

    answers = {}
    for direct_on in (False, True):
        store_module.read_directly(direct_on)
        try:
            answers[direct_on] = (
                registry.find_model("no-such-model"), registry.find_version(NAME, "3"),
                registry.find_version(NAME, "99"), registry.find_alias(NAME, "canary"),
                registry.aliases_of("no-such-model"), [str(v.version) for v in registry.list_versions(NAME)],
                registry.aliases_of(NAME), str(registry.resolve(NAME, "staging").version),
            )
            with pytest.raises(registry.RegistryError, match="no registered model named 'nothing-here'"):
                registry.list_versions("nothing-here")
            with pytest.raises(registry.RegistryError, match="has no version 7"):
                registry.resolve(NAME, "7")
        finally:
            store_module.read_directly(False)
    assert answers[True] == answers[False]
    assert answers[True][:5] == (None, None, None, None, {})


def test_runs_read_as_mlflow_reads_them(store):
    c, reader, runs = store
    experiment = c.get_experiment_by_name(f"entivec/{NAME}")
    mine = reader.get_experiment_by_name(f"entivec/{NAME}")
    assert (mine.experiment_id, mine.name, mine.artifact_location, mine.lifecycle_stage) == \
        (experiment.experiment_id, experiment.name, experiment.artifact_location, experiment.lifecycle_stage)
    assert reader.get_experiment_by_name("entivec/none") is None and c.get_experiment_by_name("entivec/none") is None
    for run_id in runs.values():
        assert _run(reader.get_run(run_id)) == _run(c.get_run(run_id))
    ids = [experiment.experiment_id]
    order = ["attributes.start_time DESC"]
    searches = [
        {"order_by": order}, {}, {"order_by": order, "max_results": 2},
        {"filter_string": "attributes.status = 'RUNNING'", "max_results": 200},
        {"filter_string": "tags.`entivec.kind` = 'gate' and tags.`entivec.candidate_version` = '2'", "order_by": order},
        {"filter_string": "tags.`entivec.kind` = 'gate' and tags.`entivec.candidate_version` = '5'", "order_by": order},
    ]
    for search in searches:
        assert [_run(r) for r in reader.search_runs(ids, **search)] == [_run(r) for r in c.search_runs(ids, **search)]


def test_artifacts_list_and_copy_as_mlflow_does(store, tmp_path):
    import mlflow.artifacts

    from entivec.settings import tracking_uri

    c, reader, runs = store
    for path in (None, "bundle", "bundle/plots", "nothing-there"):
        want = [(a.path, a.is_dir, a.file_size) for a in c.list_artifacts(runs["first"], path)]
        assert [(a.path, a.is_dir, a.file_size) for a in reader.list_artifacts(runs["first"], path)] == want
    mine = reader.download(runs["first"], "bundle", str(tmp_path / "mine"))
    theirs = mlflow.artifacts.download_artifacts(run_id=runs["first"], artifact_path="bundle",
                                                 dst_path=str(tmp_path / "theirs"), tracking_uri=tracking_uri())

    def relative(root: str) -> list[tuple[str, bytes]]:
        base = Path(root)
        return sorted((p.relative_to(base).as_posix(), p.read_bytes() if p.is_file() else b"") for p in base.rglob("*"))

    assert relative(mine) == relative(theirs) and len(relative(mine)) == 3


def test_what_it_cannot_answer_goes_to_mlflow(store, entivec_home):
    from entivec.tasks.lifecycle import direct, registry
    from entivec.tasks.lifecycle import store as store_module

    c, reader, runs = store
    with pytest.raises(direct.NotDirect):
        reader.search_runs([1], filter_string="metrics.rmse < 2")
    with pytest.raises(direct.NotDirect):
        reader.search_model_versions(f"run_id = '{runs['first']}'")
    store_module.read_directly(True)
    try:
        client = registry.client()
        assert client._reader is not None
        # Answered by MLflow through the same client, with MLflow's answer.
        found = client.search_runs([c.get_experiment_by_name(f"entivec/{NAME}").experiment_id],
                                   filter_string="metrics.rmse < 2")
        assert len(found) == 6
    finally:
        store_module.read_directly(False)
    # A store whose schema lacks a column read here is not read directly at all.
    db = sqlite3.connect(entivec_home / "mlflow.db")
    db.execute("ALTER TABLE model_versions DROP COLUMN run_link")
    db.commit()
    db.close()
    with pytest.raises(direct.NotDirect, match="run_link"):
        direct.DirectReader(entivec_home / "mlflow.db")


def test_read_commands_load_neither_mlflow_nor_prefect(entivec_home):
    """The point of the direct reads: `entivec versions` answers without importing MLflow (or Prefect)."""
    import os

    import entivec_test_vector_fixtures as vf  # registered by conftest.py

    vf.register_two_versions(entivec_home)
    code = ("import sys; from entivec.cli import main;\n"
            f"sys.argv = ['entivec', 'versions', {vf.MODEL!r}, '--format', 'json']\n"
            "try:\n    main()\nexcept SystemExit as e:\n    assert not e.code, e.code\n"
            "print(sorted(m for m in ('mlflow', 'prefect', 'torch', 'sklearn') if m in sys.modules))")
    env = {**os.environ, "ENTIVEC_HOME": str(entivec_home)}
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "[]"
    assert '"version": 2' in done.stdout
    off = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         env={**env, "ENTIVEC_DIRECT_READS": "0"})
    assert off.returncode == 0, off.stderr
    assert "mlflow" in off.stdout.strip().splitlines()[-1]  # the escape hatch: every read through MLflow
    assert off.stdout.split("\n[")[0] == done.stdout.split("\n[")[0]  # and the same listing
