"""The data path per partition on a 2-worker Dask ``LocalCluster`` gives what the single-process stream gives.

Data: invented by the seeded generator below (no outside source): four CSV files of shop orders, with one id
written in two files, a target that is not a number in the last file and a weight outside its declared range.
The reference for every Dask result is this project's single-process streamed path (``stream_clean`` and
``build_working_set`` run here) on the same files with the same seeds; the duplicate ids are checked against
pandas' ``duplicated(keep=False)`` over the files concatenated.
"""

from __future__ import annotations

import math
import sys

import cloudpickle
import numpy as np
import pandas as pd
import pytest
import yaml

from entivec.schemas.spec import load_spec
from entivec.tasks.ingest.partitioned import dask_mapper, in_process, stream_clean_parts
from entivec.tasks.ingest.stream import PARTITIONS, cleaned_table, first_pass, stream_clean
from entivec.tasks.ingest.workdir import working_set
from entivec.tasks.train.workset import build_working_set

# CSV files are read in blocks of about 100 bytes per batch row: 150 rows give blocks of 15 kB, several to a file
# of 900 rows (about 40 bytes a line), so partitions and batches both matter.
FILES, ROWS_PER_FILE, BATCH = 4, 900, 150
WAIT = 300  # seconds the Dask work may take before the test fails instead of hanging
# Functions defined here travel to Dask workers by value: the workers cannot import this test module by name.
cloudpickle.register_pickle_by_value(sys.modules[__name__])

SPEC = {
    "name": "shop-orders",
    "source": {"path": "orders-*.csv"},
    "id_column": "order",
    "target": {"column": "spend", "task": "regression", "transform": "log"},
    "columns": {"embed": [{"name": "shop", "size": 4}, {"name": "region", "size": 2}], "onehot": ["channel"],
                "numeric": ["items", {"name": "weight", "min": 0, "max": 50}]},
    "split": {"method": "random", "test_fraction": 0.25, "seed": 7},
    "training": {"epochs": 2, "batch_size": 128, "hidden": [8], "patience": 2, "threads": 1, "progress": False},
}


def invented_orders(seed: int = 11) -> pd.DataFrame:
    """Invented orders: 60 shops of uneven popularity (some below no min_count, some rare), 6 regions, a spend that
    depends on both."""
    rng = np.random.default_rng(seed)
    n = FILES * ROWS_PER_FILE
    shops = rng.zipf(1.6, n) % 60
    regions = rng.integers(0, 6, n)
    items = rng.integers(1, 9, n)
    spend = np.exp(1 + 0.05 * shops % 7 + 0.2 * regions + 0.3 * np.log(items) + rng.normal(0, 0.1, n))
    frame = pd.DataFrame({
        "order": [f"o{i:06d}" for i in rng.permutation(n)],
        "shop": [f"shop-{s:02d}" for s in shops],
        "region": [f"r{r}" for r in regions],
        "channel": rng.choice(["web", "phone", "store"], n),
        "items": items,
        "weight": np.round(rng.uniform(0.5, 40, n), 2),
        "spend": np.round(spend, 2).astype(object),
    })
    frame.loc[5, "order"] = frame.loc[3 * ROWS_PER_FILE + 17, "order"]  # one id in the first and the last file
    frame.loc[3 * ROWS_PER_FILE + 850, "spend"] = "n/k"  # not a number, in the last file's last batch
    frame.loc[ROWS_PER_FILE + 3, "weight"] = 75.0  # outside the declared range, in the second file
    return frame


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    folder = tmp_path_factory.mktemp("orders")
    frame = invented_orders()
    for i in range(FILES):
        frame.iloc[i * ROWS_PER_FILE:(i + 1) * ROWS_PER_FILE].to_csv(folder / f"orders-{i}.csv", index=False)
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(SPEC, sort_keys=False), encoding="utf-8")
    return frame, load_spec(path), path, folder


def _run(spec, path, folder, mapper=None) -> dict:
    """Everything a run keeps of the data path, read back into memory, and the vectors trained from it."""
    from entivec.tasks.train.trainer import fit_network

    first = first_pass(spec, path, folder, BATCH, mapper=mapper)
    if mapper is None:
        streamed = stream_clean(spec, path, folder, BATCH, first=first)
        ws, vocabularies, encoder = build_working_set(streamed, spec, batch_rows=BATCH)
    else:
        streamed = stream_clean_parts(spec, folder, first, mapper, BATCH)
        ws, vocabularies, encoder = build_working_set(streamed, spec, batch_rows=BATCH, mapper=mapper)
    inputs, y = ws.inputs("train")
    cards = [vocabularies[c].size for c in spec.embed_names]
    sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
    fitted = fit_network(inputs, y, columns=spec.embed_names, cardinalities=cards, sizes=sizes, training=spec.training,
                         task=spec.target.task)
    return {
        "ledger": streamed.ledger, "batches": streamed.batches, "newest": streamed.newest_time,
        "fingerprint": streamed.fingerprint,
        "quarantine": pd.read_parquet(streamed.quarantine),
        "cleaned": cleaned_table(streamed.cleaned).to_pandas(),
        "vocabularies": {c: (v.categories, v.counts) for c, v in vocabularies.items()},
        "dense_names": encoder.dense_names,
        "arrays": {f"{p}-{w}": np.array(a) for p in ("train", "test") for w, a in zip(("ids", "dense", "y"),
                                                                                      ws.arrays(p), strict=True)},
        "vectors": fitted.vectors,
        "leftover": sorted(p.name for p in folder.rglob("*-0000*")),  # part files left behind
    }


def _tasks_executed(dask_worker) -> int:
    return dask_worker.state.executed_count


def test_the_data_path_on_two_dask_workers_matches_the_single_process_stream(case, tmp_path):
    import torch
    from distributed import Client

    from entivec.flows.parallel import local_cluster

    torch.set_num_threads(1)
    frame, spec, path, _ = case
    with working_set("test", tmp_path / "one") as folder:
        single = _run(spec, path, folder)
    # The in-process Mapper through the partitioned code gives the same too (one code path, two runners).
    with working_set("test", tmp_path / "parts") as folder:
        parts_here = _run(spec, path, folder, in_process)
    with local_cluster(workers=2) as cluster:
        client = Client(cluster, timeout=WAIT)
        try:
            before = sum(client.run(_tasks_executed).values())
            with working_set("test", tmp_path / "dask") as folder:
                on_dask = _run(spec, path, folder, dask_mapper(client, timeout=WAIT))
            executed = client.run(_tasks_executed)
        finally:
            client.close()

    # The work ran on the cluster's workers: one task per id partition the ids fell into (at most PARTITIONS), one
    # per file, then one per range of cleaned rows to count and one to encode. Which worker takes which is the
    # scheduler's choice.
    ranges = math.ceil(on_dask["ledger"].rows_used / BATCH)
    tasks = sum(executed.values()) - before - FILES - 2 * ranges
    assert len(executed) == 2 and 0.75 * PARTITIONS <= tasks <= PARTITIONS, tasks

    # Reference for the checks of the data itself: pandas over the four files concatenated, as written.
    shared = frame["order"].duplicated(keep=False)
    assert int(shared.sum()) == 2
    for run in (single, parts_here, on_dask):
        reasons = run["quarantine"].set_index(["_source_file", "_source_row"])["_reasons"]
        reasons.index = [(f.rsplit("/", 1)[-1], r) for f, r in reasons.index]
        assert reasons[("orders-0.csv", 6)] == "duplicate_id" and reasons[("orders-3.csv", 18)] == "duplicate_id"
        assert "coerce:spend" in reasons[("orders-3.csv", 851)]
        assert "weight" in reasons[("orders-1.csv", 4)]
        assert run["ledger"].rows_in == FILES * ROWS_PER_FILE == run["ledger"].rows_used + len(run["quarantine"])
        assert run["leftover"] == []

    for other in (parts_here, on_dask):
        assert other["ledger"] == single["ledger"]  # every step, action, row count and example, in order
        assert other["batches"] == single["batches"] >= 2 * FILES
        assert other["fingerprint"] == single["fingerprint"]
        pd.testing.assert_frame_equal(other["quarantine"], single["quarantine"])
        pd.testing.assert_frame_equal(other["cleaned"], single["cleaned"])
        assert other["vocabularies"] == single["vocabularies"]
        assert other["dense_names"] == single["dense_names"]
        assert set(other["arrays"]) == set(single["arrays"])
        for name, values in single["arrays"].items():
            assert values.dtype == other["arrays"][name].dtype and np.array_equal(values, other["arrays"][name]), name
        for column, vectors in single["vectors"].items():
            # Bit for bit: the same encoded rows, seed and thread count.
            assert np.array_equal(vectors, other["vectors"][column]), column
    # The vocabulary is not trivial: rare shops fall to id 0, common ones have their own ids.
    categories, counts = single["vocabularies"]["shop"]
    assert len(categories) > 10 and counts[1] > counts[-1]


def test_partitions_start_where_the_previous_files_end(case, tmp_path):
    from entivec.tasks.ingest.partitioned import partitions

    frame, spec, path, _ = case
    with working_set("test", tmp_path / "ws") as folder:
        first = first_pass(spec, path, folder, BATCH)
    placed = partitions(first)
    assert [(i, offset) for i, offset, _ in placed] == [(i, i * ROWS_PER_FILE) for i in range(FILES)]
    # The two rows sharing an id (positions 5 and 2,717 of the whole table) go to the first and the last file.
    assert [list(shared) for _, _, shared in placed] == [[5], [], [], [3 * ROWS_PER_FILE + 17]]


def _run_id(output: str) -> str:
    return output.split("(run ")[1].split(")")[0]


def test_train_command_on_dask_matches_the_single_process_train_on_four_files(case, tmp_path, run_cli, monkeypatch):
    import json

    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.registry import run_file

    _, _, _, data = case
    monkeypatch.setenv("ENTIVEC_BATCH_ROWS", str(BATCH))  # several batches per file, as above
    monkeypatch.setenv("ENTIVEC_DASK_TIMEOUT", str(WAIT))
    spec = {**SPEC, "source": {"path": str(data / "orders-*.csv")},
            "evaluation": {"folds": 2, "models": ["linear"], "max_train_rows": 1_000, "seed_check": False}}
    spec_path = tmp_path / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    code, single = run_cli(["train", str(spec_path)])
    assert code == 0, single
    code, on_dask = run_cli(["train", str(spec_path), "--dask", "local", "--workers", "2"])
    assert code == 0, on_dask
    assert "one task per file on the Dask workers" in on_dask and "on the Dask workers" not in single

    runs = [_run_id(single), _run_id(on_dask)]
    ledgers = [json.loads(run_file(r, "data/ledger.json").read_text()) for r in runs]
    assert ledgers[0] == ledgers[1] and ledgers[0]["rows_in"] == FILES * ROWS_PER_FILE
    quarantines = [pd.read_parquet(run_file(r, "data/quarantine.parquet")) for r in runs]
    pd.testing.assert_frame_equal(quarantines[0], quarantines[1])
    assert (quarantines[0]["_reasons"] == "duplicate_id").sum() == 2
    first, second = (registry.load_version("shop-orders", v).vector_set for v in ("1", "2"))
    for column in ("shop", "region"):
        assert first.vocabularies[column].categories == second.vocabularies[column].categories
        assert np.array_equal(first.vectors[column], second.vectors[column]), column
