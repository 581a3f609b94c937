"""Benchmark cross-fitting: folds one after another in this process against folds on a local Dask cluster.

Run:  python benchmarks/bench_parallel.py             (100,000 rows, 5 folds, 2 workers)
      python benchmarks/bench_parallel.py --quick     (20,000 rows, 3 folds: a smoke run)

What is printed, all measured in this one run on this machine:
  (a) the sequential wall time of ``cross_fit_vectors`` outside a flow (every fold trained in this process),
      measured once before and once after the parallel run so that both see the same state of a shared machine;
  (b) the wall time of the same step on a ``LocalCluster`` (``flows.parallel.local_cluster``: N worker
      processes, one thread each) through Prefect's ``DaskTaskRunner``: ``cross_fit_vectors`` timed
      inside the flow body, so the cluster's start-up (with each worker importing torch and entivec once, as a
      long-lived cluster would have done already, and one small warm-up fold per worker inside the flow) and
      the flow run's start-up are printed separately;
  (c) the ratio sequential / parallel, and whether the out-of-fold vectors are bit-identical (they must be).

With 2 workers the ideal ratio is 2 less the cost of shipping each fold's rows to a worker; on a machine whose
2 cores are shared with other work the figure is lower, and the CPU pressure printed beside it says how busy
the machine was (Linux PSI, share of time some task waited for a CPU).

The table is the seeded synthetic one of ``bench_trainer.py`` (invented: three categorical columns with 50,
2,000 and 50,000 categories, ten numerics, a target built from hidden per-category effects and noise).
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from prefect import flow

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_trainer import CARDINALITIES, cpu_pressure, make_table  # noqa: E402

from entivec.schemas.spec import spec_from_dict  # noqa: E402
from entivec.tasks.evidence.crossfit import cross_fit_vectors, submit_folds  # noqa: E402
from entivec.tasks.train.encoder import EncodedInputs
from entivec.tasks.train.trainer import fit_network  # noqa: E402

COLUMNS = [f"c{j}" for j in range(len(CARDINALITIES))]
SIZES = [8, 16, 32]


def bench_spec(folds: int, epochs: int) -> dict:
    return {
        "name": "bench-parallel",
        "source": {"path": "unused.csv"},
        "id_column": "row_id",
        "target": {"column": "y", "task": "regression"},
        "columns": {"embed": [{"name": c, "size": s} for c, s in zip(COLUMNS, SIZES, strict=True)]},
        "training": {"epochs": epochs, "patience": epochs, "batch_size": 1024, "hidden": [64, 32],
                     "progress": False, "threads": 1},
        "evaluation": {"folds": folds, "seed": 0},
    }


@flow(name="bench-crossfit", validate_parameters=False)
def crossfit_flow(folder: str, warm_tasks: int = 0) -> tuple[dict[str, np.ndarray], float]:
    """Read the case from ``folder`` (only a path travels, never the arrays), time the submitted cross-fitting."""
    data = np.load(Path(folder) / "case.npz")
    meta = json.loads((Path(folder) / "case.json").read_text())
    spec = spec_from_dict(meta)
    inputs = EncodedInputs(data["cat_ids"], data["dense"])
    reference = {c: data[f"ref_{c}"] for c in COLUMNS}
    if warm_tasks:
        # One small fold task per worker first: a long-lived cluster's workers have already made their Prefect
        # client and run torch once (the first network a fresh process trains costs about a second more).
        small = np.arange(min(2_000, len(data["y"])))
        quick = spec.training.model_copy(update={"epochs": 1, "patience": 1})
        futures = submit_folds(inputs, data["y"], [small] * warm_tasks, columns=COLUMNS,
                               cardinalities=[c + 1 for c in CARDINALITIES], sizes=SIZES, training=quick,
                               task="regression")
        [f.result() for f in futures]
    started = time.perf_counter()
    oof = cross_fit_vectors(inputs, data["y"], spec, [c + 1 for c in CARDINALITIES], SIZES, reference)
    return oof, time.perf_counter() - started


def _warm_up() -> bool:
    """In each worker: import what a fold needs, as a long-lived cluster's workers would have done already."""
    import entivec.tasks.evidence.crossfit  # noqa: F401

    return True


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20,000 rows and 3 folds: a smoke run")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--epochs", type=int, default=12, help="epochs per fold network (all run: no early stop)")
    args = parser.parse_args(argv)
    rows, folds, epochs = (20_000, 3, 2) if args.quick else (100_000, 5, args.epochs)

    from entivec.flows.parallel import local_cluster, prefect_api_for_workers, task_runner

    table = make_table(rows, seed=7, valid_rows=1)
    raw = bench_spec(folds, epochs)
    spec = spec_from_dict(raw)
    cards = [c + 1 for c in CARDINALITIES]
    reference = fit_network(
        table.train, table.y_train, columns=COLUMNS, cardinalities=cards, sizes=SIZES, training=spec.training,
        task="regression",
    ).vectors
    print(f"cross-fitting {rows:,} rows, {folds} folds, {epochs} epochs, vectors {SIZES}, hidden [64, 32], "
          f"1 torch thread per network; {args.workers} Dask workers of 1 thread")

    def sequential() -> tuple[dict[str, np.ndarray], float, str]:
        started = time.perf_counter()
        oof = cross_fit_vectors(table.train, table.y_train, spec, cards, SIZES, reference)
        return oof, time.perf_counter() - started, cpu_pressure()

    oof_seq, seq_before, pressure_before = sequential()
    print(f"  sequential (before)   {seq_before:8.2f} s   [CPU pressure {pressure_before}]")

    with tempfile.TemporaryDirectory(prefix="bench-parallel-") as folder:
        np.savez(Path(folder) / "case.npz", cat_ids=table.train.cat_ids, dense=table.train.dense, y=table.y_train,
                 **{f"ref_{c}": m for c, m in reference.items()})
        (Path(folder) / "case.json").write_text(json.dumps(raw))
        started = time.perf_counter()
        with local_cluster(args.workers) as cluster:
            from distributed import Client

            with Client(cluster) as client:
                client.run(_warm_up)
            startup = time.perf_counter() - started
            runner = task_runner(cluster.scheduler_address)
            with prefect_api_for_workers(runner):
                flow_started = time.perf_counter()
                oof_par, par = crossfit_flow.with_options(task_runner=runner)(folder, args.workers)
                flow_wall = time.perf_counter() - flow_started
        pressure_par = cpu_pressure()
    print(f"  Dask, {args.workers} workers        {par:8.2f} s   [CPU pressure {pressure_par}]  "
          f"(cluster start {startup:.1f} s; whole flow run {flow_wall:.1f} s)")

    oof_seq2, seq_after, pressure_after = sequential()
    print(f"  sequential (after)    {seq_after:8.2f} s   [CPU pressure {pressure_after}]")

    identical = all(np.array_equal(oof_par[c], oof_seq[c]) and np.array_equal(oof_seq2[c], oof_seq[c])
                    for c in COLUMNS)
    mean_seq = (seq_before + seq_after) / 2
    print(f"ratio sequential / Dask: {mean_seq / par:.2f}x (step only), {mean_seq / flow_wall:.2f}x (whole flow run)")
    print(f"out-of-fold vectors bit-identical: {identical}")
    return 0 if identical else 1


if __name__ == "__main__":
    sys.exit(main())
