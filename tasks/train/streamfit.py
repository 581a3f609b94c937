"""Training from a working set on disk: the trainer's own step, fed shuffled blocks instead of a table in memory.

What differs from :func:`trainer.fit_network` is only where rows come from. Each epoch reads the memory-mapped
training arrays in a seeded random order of blocks with a shuffle inside each block (``WorkingSet.blocks``), so
memory holds one block, the network and the validation rows. Early stopping uses a seeded sample of the
training rows, at most ``max_valid_rows`` (250,000) of them, held out of training, instead of a share of all
rows: the mean loss of 250,000 rows has a standard error of 0.2% of the loss's own spread, steady enough to tell
epochs apart, and a share of 100 M rows would hold 15 M rows in memory. Optimizers, the hand-written passes, the
loss and the evaluation are the trainer's.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch

from entivec import progress
from entivec.schemas.spec import TrainingSpec
from entivec.tasks.train.encoder import EncodedInputs
from entivec.tasks.train.network import EntityNet
from entivec.tasks.train.trainer import (
    TrainResult,
    _evaluate,
    _FlatAdam,
    _loss_and_grad,
    _Passes,
    _RowAdam,
    _Tensors,
    _torch_state,
    _warm_start,
    default_threads,
    epoch_budget,
)
from entivec.tasks.train.workset import WorkingSet, release, take_rows

BLOCK_ROWS = 1 << 18


def _valid_positions(n: int, fraction: float, cap: int, seed: int) -> np.ndarray:
    size = min(max(1, int(round(n * fraction))), cap, n - 1)
    rng = np.random.default_rng(seed)
    picked = np.unique(rng.integers(0, n, size=int(size * 1.2) + 16))
    return np.sort(rng.permutation(picked)[:size])


def _target_scale(y: np.ndarray, skip: np.ndarray, block: int = 1 << 22) -> tuple[float, float]:
    # Mean and standard deviation of the training targets in float64, block by block (Chan et al.'s pairwise
    # combination of block means and sums of squared deviations).
    keep = np.ones(len(y), dtype=bool)
    keep[skip] = False
    count, mean, m2 = 0, 0.0, 0.0
    for start in range(0, len(y), block):
        values = np.asarray(y[start: start + block], dtype=np.float64)[keep[start: start + block]]
        release(y)
        if not len(values):
            continue
        n, m = len(values), float(values.mean())
        delta = m - mean
        m2 += float(((values - m) ** 2).sum()) + delta**2 * count * n / (count + n)
        mean += delta * n / (count + n)
        count += n
    std = math.sqrt(m2 / count) if count else 0.0
    return mean, (std if std > 0 and math.isfinite(std) else 1.0)


def fit_from_working_set(
    ws: WorkingSet, *, columns: list[str], cardinalities: list[int], sizes: list[int], training: TrainingSpec,
    task: str, block_rows: int = BLOCK_ROWS, max_valid_rows: int = 250_000,
    init_vectors: dict[str, np.ndarray] | None = None, label: str = "training",
) -> TrainResult:
    """Train the network on the working set's training rows; the same result type as ``fit_network``, the same
    epoch budget (``epoch_budget``), warm start and binary start from the base rate. With ``training.progress``
    each epoch prints one line with its rows per second (``progress``)."""
    started = time.perf_counter()
    ids_all, dense_all, y_all = ws.arrays("train")
    n_all = len(y_all)
    valid_at = _valid_positions(n_all, training.validation_fraction, max_valid_rows, training.seed)
    valid_inputs = EncodedInputs(take_rows(ids_all, valid_at), take_rows(dense_all, valid_at))
    valid_y = take_rows(y_all, valid_at).astype(np.float64)
    if task == "regression":
        shift, scale = _target_scale(y_all, valid_at)
        rate = None
    else:
        shift, scale = 0.0, 1.0
        rate, _ = _target_scale(y_all, valid_at)  # the base rate: the mean of 0/1 targets
    for array in (ids_all, dense_all, y_all):
        release(array)  # the sample touched pages all over the arrays
    valid = _Tensors(valid_inputs, (valid_y - shift) / scale)
    n = n_all - len(valid_at)
    n_dense = dense_all.shape[1]
    threads = training.threads or default_threads(cardinalities, sizes, n_dense, training.hidden)
    with _torch_state(threads, training.seed):
        model = EntityNet(cardinalities, sizes, n_dense, training.hidden, training.dropout)
        model.target_shift.fill_(shift)
        model.target_scale.fill_(scale)
        with torch.no_grad():
            if rate is not None:  # as fit_network: start from the base rate
                rate = min(max(rate, 1e-6), 1 - 1e-6)
                model.output.bias.fill_(math.log(rate / (1 - rate)))
            for j, column in enumerate(columns):
                if init_vectors and column in init_vectors:
                    _warm_start(model.embeddings[j].weight, np.asarray(init_vectors[column]), column)
        history, best_epoch, best_loss = _loop(model, ws, valid, valid_at, n, training, task, block_rows,
                                               shift, scale, label)
    loss_scale = scale**2 if task == "regression" else 1.0
    for row in history:
        row["train_loss"] *= loss_scale
        row["valid_loss"] *= loss_scale
    model.eval()
    return TrainResult(model=model, history=history, best_epoch=best_epoch, best_valid_loss=best_loss * loss_scale,
                       vectors=dict(zip(columns, model.vectors(), strict=True)),
                       seconds=time.perf_counter() - started)


def _loop(model: EntityNet, ws: WorkingSet, valid: _Tensors, valid_at: np.ndarray, n: int, training: TrainingSpec,
          task: str, block_rows: int, shift: float, scale: float, label: str) -> tuple[list[dict], int, float]:
    batch = min(training.batch_size, n)
    tables = [table.weight for table in model.embeddings]
    dense_params = [p for name, p in model.named_parameters() if not name.startswith("embeddings.")]
    dense_opt = _FlatAdam(dense_params, training.learning_rate, training.weight_decay)
    row_opts = [_RowAdam(w, training.learning_rate, training.weight_decay) for w in tables]
    offsets = np.cumsum([0, *model.sizes]).tolist()
    embedded = offsets[-1]
    passes = _Passes(model, batch, embedded, embedded + ws.arrays("train")[1].shape[1])
    grad_out = torch.empty((batch, 1))
    best_loss, best_epoch, best_state, waited = math.inf, 0, None, 0
    history: list[dict] = []
    try:
        with torch.no_grad():
            for epoch in range(1, epoch_budget(training, n) + 1):
                tick = time.perf_counter()
                shown = progress.begin(f"{label} epoch {epoch}") if training.progress else None
                model.train()
                total = torch.zeros(())
                for ids_b, dense_b, y_b in ws.blocks("train", block_rows, seed=training.seed * 100_003 + epoch,
                                                     exclude=valid_at):
                    ids_t = torch.from_numpy(np.ascontiguousarray(ids_b.T, dtype=np.int64))
                    dense_t = torch.from_numpy(dense_b)
                    y_t = torch.from_numpy(((y_b.astype(np.float64) - shift) / scale).astype(np.float32))
                    for start in range(0, len(y_b), batch):
                        stop = min(start + batch, len(y_b))
                        rows = stop - start
                        ids = ids_t[:, start:stop]
                        x = passes.x[:rows]
                        for j, weight in enumerate(tables):
                            torch.index_select(weight, 0, ids[j], out=x[:, offsets[j]: offsets[j + 1]])
                        x[:, embedded:] = dense_t[start:stop]
                        raw = passes.forward(rows)
                        total += _loss_and_grad(raw, y_t[start:stop], task, grad_out[:rows])
                        emb_grad = passes.backward(rows, grad_out[:rows])
                        dense_opt.step()
                        for j, opt in enumerate(row_opts):
                            opt.step(ids[j], emb_grad[:, offsets[j]: offsets[j + 1]])
                train_loss = float(total) / n
                model.eval()
                valid_loss = _evaluate(model, valid, task)
                seconds = time.perf_counter() - tick
                history.append({"epoch": epoch, "train_loss": train_loss, "valid_loss": valid_loss,
                                "seconds": seconds, "rows_per_second": n / seconds if seconds > 0 else float("inf")})
                if shown is not None:
                    shown.end(n, f"best epoch {best_epoch if valid_loss >= best_loss else epoch}")
                if not math.isfinite(train_loss):
                    raise FloatingPointError(f"{label}: the training loss became {train_loss} in epoch {epoch}; "
                                             f"lower training.learning_rate")
                if valid_loss < best_loss:
                    best_loss, best_epoch, waited = valid_loss, epoch, 0
                    best_state = {k: t.detach().clone() for k, t in model.state_dict().items()}
                else:
                    waited += 1
                if waited >= training.patience:
                    break
    finally:
        dense_opt.release()
    if best_state is not None:
        model.load_state_dict(best_state)
    return history, best_epoch, best_loss
