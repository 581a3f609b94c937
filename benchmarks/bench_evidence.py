"""What the evidence costs beside the vector training, stage by stage, on one generated table in one run.

Run:  python benchmarks/bench_evidence.py                    (1,000,000 rows: the stage table)
      python benchmarks/bench_evidence.py --rows 200000      (a smaller table: shows the evidence does not shrink)
      python benchmarks/bench_evidence.py --models           (downstream model choices, quiet and under load)

Stage table (the train flow's steps called as plain functions, in the flow's order, on the spec's defaults):
  train vectors      the network on every training row (the vectors a version ships)
  fold networks      one network per fold on the seeded fold sample (evaluation.max_fold_rows), aligned onto the
                     full-data vectors, plus the per-category confidence they give
  downstream models  every model of evaluation.models on every feature set (baseline, one-hot, target encoding,
                     out-of-fold vectors, and the leaky in-sample contrast) on the seeded downstream sample
                     (evaluation.max_train_rows), scored on the seeded test sample (evaluation.max_test_rows),
                     with the paired bootstrap intervals
  seed check         a second network on the same rows with another seed (evaluation.seed_check), printed apart:
                     it is not part of the evaluation the ratio covers, and doubles the training when on
Each line prints its wall time, its CPU time (this process: on a shared machine the wall time of one stage swings
by half with other people's jobs, the CPU time of single-threaded work far less), the load average and the CPU
pressure (Linux PSI, share of time a task waited for a CPU) measured when it ended; then evaluation / training.

--models times the downstream model settings that were candidates (tree counts, threads) on the downstream sample
of the same table, once on a quiet machine and once while one busy process (a spinning child started here) holds
one core, and prints each one's primary metric beside its time.

The table is invented by seeded code: three categorical columns of 50, 2,000 and 50,000 categories (skewed
frequencies), ten numerics and a target built from hidden per-category effects, one category-numeric interaction
and noise (the same construction as benchmarks/bench_trainer.py).
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).parent))

from bench_trainer import cpu_pressure  # noqa: E402

from entivec.schemas.spec import Spec, spec_from_dict  # noqa: E402
from entivec.schemas.vocabulary import Vocabulary  # noqa: E402
from entivec.tasks.evidence.confidence import FoldSpread, confidence_tables  # noqa: E402
from entivec.tasks.evidence.crossfit import cross_fit_vectors, vectors_for_ids  # noqa: E402
from entivec.tasks.evidence.downstream import capped_rows, compare_downstream  # noqa: E402
from entivec.tasks.evidence.stability import seed_stability  # noqa: E402
from entivec.tasks.train.encoder import FeatureEncoder  # noqa: E402
from entivec.tasks.train.network import predict  # noqa: E402
from entivec.tasks.train.trainer import fit_network  # noqa: E402

CARDINALITIES = {"region": 50, "outlet": 2_000, "article": 50_000}
NUMERICS = 10


def make_frame(rows: int, seed: int) -> pd.DataFrame:
    """An invented wholesale table: three category columns, ten numerics, a target (see the module notes)."""
    rng = np.random.default_rng(seed)
    data, effect, slopes = {}, np.zeros(rows), None
    for j, (name, card) in enumerate(CARDINALITIES.items()):
        weights = 1.0 / (np.arange(card) + 10.0)
        codes = rng.choice(card, size=rows, p=weights / weights.sum())
        data[name] = pd.Categorical.from_codes(codes, [f"{name[:2]}{i:05d}" for i in range(card)])
        effect += rng.normal(size=card)[codes]
        if j == 1:
            slopes = rng.normal(scale=0.5, size=card)[codes]
    numerics = rng.normal(size=(rows, NUMERICS))
    for i in range(NUMERICS):
        data[f"x{i}"] = numerics[:, i]
    data["demand"] = effect + numerics @ rng.normal(scale=0.3, size=NUMERICS) + slopes * numerics[:, 0] + rng.normal(
        scale=0.5, size=rows)
    data["row"] = np.arange(rows)
    return pd.DataFrame(data)


def bench_spec(size_rule: str | None) -> Spec:
    embed = [{"name": c, **({"size_rule": size_rule} if size_rule else {})} for c in CARDINALITIES]
    return spec_from_dict({
        "name": "bench-evidence", "source": {"path": "unused.csv"}, "id_column": "row",
        "target": {"column": "demand", "task": "regression"},
        "columns": {"embed": embed, "numeric": [f"x{i}" for i in range(NUMERICS)]},
        "training": {"progress": False},
    })


def load() -> str:
    return f"load {os.getloadavg()[0]:.2f}, cpu pressure {cpu_pressure()}"


def stages(args) -> None:
    frame = make_frame(args.rows, args.seed)
    spec = bench_spec(args.size_rule)
    split = np.random.default_rng(args.seed).permutation(len(frame))
    n_test = int(len(frame) * spec.split.test_fraction)
    train_rows, test_rows = frame.iloc[np.sort(split[n_test:])], frame.iloc[np.sort(split[:n_test])]
    vocabularies = {c.name: Vocabulary.build(c.name, train_rows[c.name], c.min_count) for c in spec.columns.embed}
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    train_inputs, test_inputs = encoder.transform(train_rows), encoder.transform(test_rows)
    y_train = train_rows["demand"].to_numpy(float)
    cards = [vocabularies[c].size for c in spec.embed_names]
    sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
    ev = spec.evaluation
    print(f"table: {len(frame):,} rows ({len(train_rows):,} train, {len(test_rows):,} test); vector sizes "
          f"{dict(zip(spec.embed_names, sizes, strict=True))}; fold sample {ev.max_fold_rows:,}, downstream sample "
          f"{ev.max_train_rows:,}, test sample {ev.max_test_rows:,}, folds {ev.folds}, models {ev.models}")
    print(f"start: {load()}", flush=True)

    times, cpu = {}, {}
    start, c0 = time.perf_counter(), time.process_time()
    result = fit_network(train_inputs, y_train, columns=spec.embed_names, cardinalities=cards, sizes=sizes,
                         training=spec.training, task="regression")
    pred = predict(result.model, test_inputs, "regression")
    times["train vectors"], cpu["train vectors"] = time.perf_counter() - start, time.process_time() - c0
    print(f"train vectors       {times['train vectors']:8.1f} s wall {cpu['train vectors']:8.1f} s cpu   "
          f"({len(result.history)} epochs, best {result.best_epoch}; {load()})", flush=True)

    start, c0 = time.perf_counter(), time.process_time()
    fold_rows = capped_rows(len(train_rows), ev.max_fold_rows, ev.seed)
    picked = capped_rows(len(fold_rows), ev.max_train_rows, ev.seed)
    rows = fold_rows[picked]
    tested = capped_rows(len(test_rows), ev.max_test_rows, ev.seed)
    spread = FoldSpread()
    oof = cross_fit_vectors(train_inputs.take(fold_rows), y_train[fold_rows], spec, cards, sizes, result.vectors,
                            spread=spread, keep=picked)
    confidence_tables(spread, vocabularies, result.vectors)
    times["fold networks"], cpu["fold networks"] = time.perf_counter() - start, time.process_time() - c0
    print(f"fold networks       {times['fold networks']:8.1f} s wall {cpu['fold networks']:8.1f} s cpu   "
          f"({load()})", flush=True)

    start, c0 = time.perf_counter(), time.process_time()
    evidence = compare_downstream(
        train_rows.iloc[rows], test_rows.iloc[tested], spec, vectors_oof=oof,
        vectors_in_sample=vectors_for_ids(train_inputs.cat_ids[rows], result.vectors, spec.embed_names),
        vectors_test=vectors_for_ids(test_inputs.cat_ids[tested], result.vectors, spec.embed_names),
        network_test_pred=pred[tested], n_available=len(train_rows), n_test_available=len(test_rows),
    )
    times["downstream models"], cpu["downstream models"] = time.perf_counter() - start, time.process_time() - c0
    print(f"downstream models   {times['downstream models']:8.1f} s wall {cpu['downstream models']:8.1f} s cpu   "
          f"({load()})", flush=True)
    evaluation = times["fold networks"] + times["downstream models"]
    evaluation_cpu = cpu["fold networks"] + cpu["downstream models"]
    print(f"evaluation total    {evaluation:8.1f} s wall {evaluation_cpu:8.1f} s cpu   evaluation / training = "
          f"{evaluation / times['train vectors']:.2f} (wall), {evaluation_cpu / cpu['train vectors']:.2f} (cpu)",
          flush=True)

    start = time.perf_counter()  # the seed check (evaluation.seed_check): a second network, another seed
    reseeded = fit_network(train_inputs, y_train, columns=spec.embed_names, cardinalities=cards, sizes=sizes,
                           training=spec.training.model_copy(update={"seed": spec.training.seed + 1_000}),
                           task="regression")
    stability = seed_stability(vocabularies, result.vectors, reseeded.vectors)
    times["seed check"] = time.perf_counter() - start
    print(f"seed check          {times['seed check']:8.1f} s   ({load()}); with it, evaluation / training = "
          f"{(evaluation + times['seed check']) / times['train vectors']:.2f}")
    for col, figures in stability.items():
        print(f"  {col}: seed overlap {figures['seed_neighbour_overlap']:.3f} (chance "
              f"{figures['seed_chance_overlap']:.3f}), aligned distance {figures['seed_aligned_distance']:.3f}")
    print()
    print(evidence.summary)


def _spin(stop) -> None:  # one busy core: the "under load" condition
    while not stop.is_set():
        sum(range(10_000))


def models(args) -> None:
    from threadpoolctl import threadpool_limits

    from entivec.tasks.evidence import downstream
    from entivec.tasks.evidence.metrics import task_metrics

    frame = make_frame(min(args.rows, 400_000), args.seed)
    spec = bench_spec(args.size_rule)
    sample = frame.iloc[capped_rows(len(frame), 2 * (args.sample or spec.evaluation.max_train_rows), args.seed)]
    train, test = sample.iloc[: len(sample) // 2], sample.iloc[len(sample) // 2:]
    y = train["demand"].to_numpy(float)
    sets = downstream.feature_sets(train, test, spec, y, {})
    X_train, X_test = sets["target_encoding"]
    print(f"downstream sample {len(train):,} rows x {X_train.shape[1]} features (target-encoding set), "
          f"scored on {len(test):,}")
    from sklearn.ensemble import RandomForestRegressor

    candidates = [
        (f"random forest {t} trees, n_jobs {j}", lambda t=t, j=j: RandomForestRegressor(
            n_estimators=t, min_samples_leaf=5, max_features=0.5, n_jobs=j, random_state=0), 1)
        for t in (50, 100) for j in (1, 2)
    ] + [
        (f"hist gradient boosting, {k} OpenMP thread(s)", lambda: downstream.downstream_model(
            "hist_gradient_boosting", "regression", 0), k) for k in (1, 2)
    ]
    for condition in ("quiet", "one core busy"):
        stop = multiprocessing.Event()
        spinner = None
        if condition != "quiet":
            spinner = multiprocessing.Process(target=_spin, args=(stop,))
            spinner.start()
            time.sleep(2)
        try:
            for label, make, threads in candidates:
                with threadpool_limits(limits=threads, user_api="openmp"):
                    start = time.perf_counter()
                    model = make().fit(X_train, y)
                    seconds = time.perf_counter() - start
                rmse = task_metrics("regression", test["demand"].to_numpy(float), model.predict(X_test))["rmse"]
                print(f"{condition:14s} {label:42s} fit {seconds:7.2f} s  rmse {rmse:.4f}  ({load()})", flush=True)
        finally:
            if spinner is not None:
                stop.set()
                spinner.join()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--size-rule", default=None, help="a named size rule for every column (default: the spec's)")
    parser.add_argument("--models", action="store_true", help="time the downstream model choices instead")
    parser.add_argument("--sample", type=int, default=None, help="--models: downstream rows (default: the spec's)")
    args = parser.parse_args()
    import torch

    torch.set_num_threads(1)
    (models if args.models else stages)(args)


if __name__ == "__main__":
    main()
