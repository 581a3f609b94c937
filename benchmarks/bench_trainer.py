"""Benchmark the vector trainer against a straightforward DataLoader loop over the same network, side by side.

Run:  python benchmarks/bench_trainer.py            (1,000,000 rows)
      python benchmarks/bench_trainer.py --quick    (100,000 rows, a smoke run)

What is printed, all measured in this one run on this machine:
  (a) rows per second per epoch: our trainer (whole epochs, permutation and validation included) against a
      plain ``DataLoader(TensorDataset, batch_size=64, shuffle=True)`` loop with ``torch.optim.Adam`` over the
      same network; the plain loop is timed over a bounded number of batches, half just before and half just
      after the trainer runs (so that both see the same state of a shared machine), and extrapolated to an epoch;
  (b) time to equal validation loss: a fresh plain loop runs until it reaches the validation loss our trainer
      had after each of its epochs in turn (the trainer's time counted from the start of epoch 1), or until a
      time budget ends, in which case the ratio printed is a lower bound. The plain loop's loss is checked every
      budget/60 seconds, so each time is printed as the range between two checks. The plain loop learns more
      per row early on (many more, smaller steps), so the first epoch's ratio is the least favourable to us;
  (c) the trainer's peak memory: the process's peak resident set size (``resource.getrusage``, ru_maxrss),
      before and after training (torch allocates outside Python's allocator, so tracemalloc would miss it).

Each configuration's header states the network (vector sizes, hidden layers), batch size, learning rate and
thread count, and which of them are the spec's defaults. Both loops train that same network on the same
standardized target with the same learning rate; only the loop differs.

The machine's CPU pressure (Linux PSI, share of time some task waited for a CPU) is printed beside each
measurement: on a shared machine a high value means the figures are pessimistic, especially with two threads.

The synthetic table is invented by seeded code: three categorical columns with 50, 2,000 and 50,000 categories
(skewed frequencies), ten numerics, and a target built from hidden per-category effects, a category-numeric
interaction and noise, so that the loss falls as the vectors learn the effects.
"""

from __future__ import annotations

import argparse
import math
import resource
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

from entivec.schemas.spec import EmbedColumn, TrainingSpec, embedding_size
from entivec.tasks.train.encoder import EncodedInputs
from entivec.tasks.train.network import EntityNet, count_parameters
from entivec.tasks.train.trainer import default_threads, fit_network

CARDINALITIES = [50, 2_000, 50_000]  # real categories; each table has one more row for the unknown id 0
NUMERICS = 10
NAIVE_BATCH = 64


@dataclass
class Table:
    train: EncodedInputs
    y_train: np.ndarray
    valid: EncodedInputs
    y_valid: np.ndarray


def make_table(rows: int, seed: int, valid_rows: int) -> Table:
    """Seeded synthetic rows with a hidden structure (see the module docstring)."""
    rng = np.random.default_rng(seed)
    total = rows + valid_rows
    ids, effect = [], np.zeros(total)
    slopes = None
    for j, card in enumerate(CARDINALITIES):
        # Skewed frequencies: category r is drawn with probability proportional to 1 / (r + 10).
        weights = 1.0 / (np.arange(card) + 10.0)
        column = rng.choice(card, size=total, p=weights / weights.sum()) + 1  # ids 1..card; 0 is unknown
        ids.append(column)
        effects = rng.normal(size=card + 1)
        effect += effects[column]
        if j == 1:
            slopes = rng.normal(scale=0.5, size=card + 1)[column]
    numerics = rng.normal(size=(total, NUMERICS)).astype(np.float32)
    weights = rng.normal(scale=0.3, size=NUMERICS)
    y = effect + numerics @ weights + slopes * numerics[:, 0] + rng.normal(scale=0.5, size=total)
    cat_ids = np.stack(ids, axis=1)
    return Table(
        EncodedInputs(cat_ids[:rows], numerics[:rows]),
        y[:rows],
        EncodedInputs(cat_ids[rows:], numerics[rows:]),
        y[rows:],
    )


def cpu_pressure() -> str:
    """Linux PSI 'some' average over the last 10 seconds, or '?' where the kernel does not offer it."""
    try:
        line = Path("/proc/pressure/cpu").read_text().splitlines()[0]
        return line.split()[1].split("=")[1] + "%"
    except (OSError, IndexError):
        return "?"


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


# --- our trainer ---------------------------------------------------------------------------------------------------


def run_trainer(table: Table, training: TrainingSpec, sizes: list[int]) -> dict:
    before = peak_rss_mib()
    result = fit_network(
        table.train,
        table.y_train,
        columns=[f"c{j}" for j in range(len(CARDINALITIES))],
        cardinalities=[c + 1 for c in CARDINALITIES],
        sizes=sizes,
        training=training,
        task="regression",
        valid=(table.valid, table.y_valid),
        label="benchmark",
    )
    return {"result": result, "rss_before": before, "rss_after": peak_rss_mib(), "pressure": cpu_pressure()}


# --- the straightforward loop --------------------------------------------------------------------------------------


class NaiveLoop:
    """What one writes first: a DataLoader over a TensorDataset, batch 64, shuffled; Adam on every parameter.

    It learns the same standardized target with the same network, initialisation and learning rate.
    """

    def __init__(self, table: Table, training: TrainingSpec, sizes: list[int], seed: int) -> None:
        self.shift, self.scale = float(table.y_train.mean()), float(table.y_train.std())
        torch.manual_seed(training.seed)
        self.model = EntityNet([c + 1 for c in CARDINALITIES], sizes, NUMERICS, training.hidden, training.dropout)
        self.optimizer = torch.optim.Adam(self.model.parameters(), lr=training.learning_rate)
        dataset = torch.utils.data.TensorDataset(
            torch.from_numpy(table.train.cat_ids),
            torch.from_numpy(table.train.dense),
            torch.from_numpy(((table.y_train - self.shift) / self.scale).astype(np.float32)),
        )
        self.loader = torch.utils.data.DataLoader(
            dataset, batch_size=NAIVE_BATCH, shuffle=True, generator=torch.Generator().manual_seed(seed)
        )
        self.valid_ids = torch.from_numpy(table.valid.cat_ids)
        self.valid_dense = torch.from_numpy(table.valid.dense)
        self.valid_y = torch.from_numpy(((table.y_valid - self.shift) / self.scale).astype(np.float32))
        self.batches = self._forever()

    def _forever(self):
        while True:
            yield from self.loader

    def train(self, batches: int) -> float:
        """Run some batches; the seconds they took."""
        self.model.train()
        started = time.perf_counter()
        for _ in range(batches):
            ids, dense, y = next(self.batches)
            loss = F.mse_loss(self.model(ids, dense), y)  # target shift 0 and scale 1: the raw output
            self.optimizer.zero_grad()
            loss.backward()
            self.optimizer.step()
        return time.perf_counter() - started

    def valid_loss(self) -> float:
        """Validation MSE on the target's own scale (comparable with the trainer's history)."""
        self.model.eval()
        with torch.no_grad():
            raw = self.model(self.valid_ids, self.valid_dense)
            return float(F.mse_loss(raw, self.valid_y)) * self.scale**2


def naive_throughput(loop: NaiveLoop, batches: int, max_seconds: float) -> dict:
    """Rows per second over ``batches`` batches, or fewer if ``max_seconds`` of training run out first."""
    loop.train(5)  # warm-up: first-call allocations
    seconds, done = 0.0, 0
    while done < batches and seconds < max_seconds:
        step = min(10, batches - done)
        seconds += loop.train(step)
        done += step
    return {
        "rows_per_second": done * NAIVE_BATCH / seconds,
        "batches": done,
        "seconds": seconds,
        "pressure": cpu_pressure(),
    }


def naive_time_to_loss(loop: NaiveLoop, targets: list[float], budget: float, check_every: float) -> list[dict]:
    """Train until the validation loss is at or below each of ``targets`` in turn, or ``budget`` seconds run out.

    The validation passes are not counted in the loop's time (in its favour). The loss is checked after about
    every ``check_every`` seconds of training, so a target is reached between the previous check (``earliest``,
    a lower bound) and the check that saw it (``seconds``).
    """
    found: list[dict] = []
    spent, rows, loss, previous = 0.0, 0, math.inf, 0.0
    chunk = 50
    pending = list(targets)
    while pending and spent < budget:
        took = loop.train(chunk)
        spent += took
        rows += chunk * NAIVE_BATCH
        chunk = max(10, int(chunk * check_every / max(took, 1e-9)))  # aim at check_every seconds per chunk
        loss = loop.valid_loss()
        while pending and loss <= pending[0]:
            found.append(
                {
                    "target": pending.pop(0),
                    "reached": True,
                    "seconds": spent,
                    "earliest": previous,
                    "rows": rows,
                    "loss": loss,
                    "pressure": cpu_pressure(),
                }
            )
        previous = spent
    for target in pending:
        found.append(
            {
                "target": target,
                "reached": False,
                "seconds": spent,
                "earliest": spent,
                "rows": rows,
                "loss": loss,
                "pressure": cpu_pressure(),
            }
        )
    return found


# --- the report ----------------------------------------------------------------------------------------------------


def describe_defaults(training: TrainingSpec, rule: str) -> str:
    """Which settings of this run are the spec's defaults (a user who sets nothing gets those)."""
    spec, column = TrainingSpec(), EmbedColumn(name="x")
    marks = [
        ("vector size rule", rule, column.size_rule),
        ("hidden", training.hidden, spec.hidden),
        ("batch_size", training.batch_size, spec.batch_size),
        ("learning_rate", training.learning_rate, spec.learning_rate),
    ]
    parts = [
        f"{name} {value} ({'default' if value == default else f'default is {default}'})"
        for name, value, default in marks
    ]
    every = all(value == default for _, value, default in marks)
    return "; ".join(parts) + ("  -> the spec's default network" if every else "  -> NOT the spec's default network")


def sizes_for(rule: str) -> list[int]:
    return [embedding_size(c + 1, rule) for c in CARDINALITIES]


def bench_configuration(table: Table, training: TrainingSpec, rule: str, args: argparse.Namespace) -> dict:
    sizes = sizes_for(rule)
    n_train = len(table.y_train)
    threads = training.threads or default_threads([c + 1 for c in CARDINALITIES], sizes, NUMERICS, training.hidden)
    training = training.model_copy(update={"threads": threads})
    net = EntityNet([c + 1 for c in CARDINALITIES], sizes, NUMERICS, training.hidden)
    print(
        f"\n== size rule {rule}: vector sizes {sizes}, hidden {training.hidden}, {count_parameters(net):,} "
        f"parameters; batch {training.batch_size}, lr {training.learning_rate}, {threads} torch thread(s) =="
    )
    print(f"  configuration vs the spec's defaults: {describe_defaults(training, rule)}")

    previous_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        loop = NaiveLoop(table, training, sizes, seed=training.seed)
        before = naive_throughput(loop, args.naive_batches // 2, max_seconds=args.naive_budget / 12)
    finally:
        torch.set_num_threads(previous_threads)

    trained = run_trainer(table, training, sizes)
    history = trained["result"].history
    for row in history:
        print(
            f"  trainer epoch {row['epoch']}: {row['rows_per_second']:>12,.0f} rows/s  "
            f"({row['seconds']:.2f} s)  valid MSE {row['valid_loss']:.4f}"
        )
    trainer_rps = float(np.median([row["rows_per_second"] for row in history]))
    print(f"  [CPU pressure after trainer: {trained['pressure']}]")

    previous_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        after = naive_throughput(loop, args.naive_batches // 2, max_seconds=args.naive_budget / 12)
        # The chase starts from a fresh network: the batches timed above must not count as progress.
        loop = NaiveLoop(table, training, sizes, seed=training.seed)
        # Targets: the trainer's validation loss after each epoch that improved on the ones before.
        targets, cumulative, best = [], [], math.inf
        elapsed = 0.0
        for row in history:
            elapsed += row["seconds"]
            if row["valid_loss"] < best:
                best = row["valid_loss"]
                targets.append(best)
                cumulative.append((row["epoch"], elapsed))
        chase = naive_time_to_loss(loop, targets, budget=args.naive_budget, check_every=args.naive_budget / 60)
    finally:
        torch.set_num_threads(previous_threads)

    batches = before["batches"] + after["batches"]
    naive_rps = batches * NAIVE_BATCH / (before["seconds"] + after["seconds"])
    print(
        f"  (a) rows/s per epoch: trainer {trainer_rps:,.0f} (median of {len(history)} epochs) vs plain loop "
        f"{naive_rps:,.0f} (extrapolated from {batches} batches of {NAIVE_BATCH}: {before['rows_per_second']:,.0f} "
        f"before and {after['rows_per_second']:,.0f} after the trainer; an epoch would take "
        f"{n_train / naive_rps:,.0f} s)  ->  {trainer_rps / naive_rps:,.1f}x"
        f"   [CPU pressure: {before['pressure']} / {after['pressure']}]"
    )
    print(f"  (b) time to equal validation MSE (plain loop budget {args.naive_budget:.0f} s of training):")
    for (epoch, trainer_seconds), hit in zip(cumulative, chase, strict=True):
        if hit["reached"]:
            ratio = f"{hit['earliest'] / trainer_seconds:,.1f}x to {hit['seconds'] / trainer_seconds:,.1f}x"
            found = f"plain loop {hit['earliest']:.1f}-{hit['seconds']:.1f} s (<= {hit['rows']:,} rows)"
        else:
            ratio = f">= {hit['seconds'] / trainer_seconds:,.1f}x (lower bound: not reached)"
            found = f"plain loop not there after {hit['seconds']:.1f} s ({hit['rows']:,} rows, MSE {hit['loss']:.4f})"
        print(
            f"      MSE {hit['target']:.4f}: trainer {trainer_seconds:.2f} s (epoch {epoch}); {found}  ->  {ratio}"
            f"   [CPU pressure: {hit['pressure']}]"
        )
    print(
        f"  (c) trainer peak memory: process peak RSS {trained['rss_after']:,.0f} MiB "
        f"(was {trained['rss_before']:,.0f} MiB before training: +{trained['rss_after'] - trained['rss_before']:,.0f}"
        " MiB; resource.getrusage ru_maxrss)"
    )
    return {"rule": rule, "trainer_rps": trainer_rps, "naive_rps": naive_rps, "chase": chase}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000, help="training rows (default 1,000,000)")
    parser.add_argument("--quick", action="store_true", help="100,000 rows and short budgets: a smoke run")
    parser.add_argument("--valid-rows", type=int, default=50_000)
    parser.add_argument("--epochs", type=int, default=3)
    parser.add_argument("--batch-size", type=int, default=TrainingSpec().batch_size)
    parser.add_argument("--learning-rate", type=float, default=TrainingSpec().learning_rate)
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: the trainer's choice)")
    parser.add_argument(
        "--size-rules",
        default="fourth_root,power_056",
        help="comma-separated embedding size rules to run (fourth_root, half_capped, power_056)",
    )
    parser.add_argument("--naive-batches", type=int, default=300, help="plain-loop batches timed for (a)")
    parser.add_argument("--naive-budget", type=float, default=180.0, help="seconds the plain loop may chase (b)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--hidden",
        default=",".join(str(h) for h in TrainingSpec().hidden),
        help="dense layer widths, comma-separated (default: the spec's default)",
    )
    args = parser.parse_args(argv)
    if args.quick:
        args.rows, args.valid_rows = 100_000, 10_000
        args.naive_batches, args.naive_budget = min(args.naive_batches, 100), min(args.naive_budget, 30.0)

    print(
        f"entivec trainer benchmark: {args.rows:,} training rows, {args.valid_rows:,} validation rows, "
        f"categories {CARDINALITIES}, {NUMERICS} numerics; torch {torch.__version__}, {torch.get_num_threads()} "
        f"cores visible; CPU pressure {cpu_pressure()}"
    )
    started = time.perf_counter()
    table = make_table(args.rows, args.seed, args.valid_rows)
    print(f"synthetic table made in {time.perf_counter() - started:.1f} s")
    training = TrainingSpec(
        epochs=args.epochs,
        batch_size=args.batch_size,
        learning_rate=args.learning_rate,
        threads=args.threads,
        hidden=[int(h) for h in args.hidden.split(",")],
        patience=args.epochs,
        progress=False,
        seed=args.seed,
    )
    for rule in args.size_rules.split(","):
        bench_configuration(table, training, rule.strip(), args)
    return 0


if __name__ == "__main__":
    sys.exit(main())
