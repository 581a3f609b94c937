"""Train entity vectors on CPU, seeded: the loop, its optimizers and early stopping, in one file.

Longer than 500 lines because the whole training step is kept in one file on purpose: what runs once per
batch (gather, hand-written dense passes, the two Adam variants, early stopping) reads top to bottom here.

Speed comes from the loop's shape (each point measured on the benchmark table, benchmarks/bench_trainer.py):

- one ``torch.randperm`` per epoch permutes whole tensors once, into buffers reused from epoch to epoch; every
  batch is then a contiguous slice;
- no autograd: the dense layers' forward and backward passes are written out as matrix products into buffers
  allocated once, and the weight gradients land directly in one flat buffer, so the dense layers' Adam step
  is one call of torch's fused Adam kernel;
- the embedding lookup gives the gradient of each looked-up vector, never a table-sized gradient; each table is
  then updated with Adam on the rows that occurred in the batch only ("lazy" Adam: a row's moments decay only
  when the row is used — the same rule as ``torch.optim.SparseAdam``), which makes a step cost the batch, not
  the table;
- validation runs without gradients in large slices.

Determinism: with the same seed, data and thread count, two runs give bit-identical vectors. The global torch
random state, thread count and deterministic-algorithms flag of the caller are restored afterwards.
Threads: ``training.threads``, else :func:`default_threads` (one thread on this 2-core class of machine:
measured faster for small networks, and far safer whenever other work competes for the cores).

Caution: vectors of places (postcodes, depots, stores) can act as proxies for protected attributes of the
people who live or shop there; check downstream use before relying on them.
"""

from __future__ import annotations

import math
import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from prefect import task
from prefect.cache_policies import NONE as NO_CACHE

from entivec import progress
from entivec.schemas.spec import TrainingSpec
from entivec.tasks.train.encoder import EncodedInputs
from entivec.tasks.train.network import EntityNet

# Adam's published defaults (Kingma & Ba, "Adam: A Method for Stochastic Optimization", ICLR 2015),
# the same as torch.optim.Adam's.
ADAM_BETAS = (0.9, 0.999)
ADAM_EPS = 1e-8

_EVAL_SLICE = 65_536
_PROGRESS_EVERY = 32  # batches between progress-bar updates

# --- optimisation ------------------------------------------------------------------------------------------------


def _adam_step(
    params: torch.Tensor,
    grads: torch.Tensor,
    m: torch.Tensor,
    v: torch.Tensor,
    step: torch.Tensor,
    lr: float,
    wd: float,
) -> None:
    """One Adam step in place with torch's own fused kernel (the one behind ``torch.optim.Adam(fused=True)``).

    ``step`` is a float tensor holding the number of steps taken so far; it is incremented here, as
    ``torch.optim.Adam`` does before calling the kernel. Weight decay is the L2 penalty of torch.optim.Adam
    (added to the gradient), not AdamW's decoupled decay. The kernel is called directly: the functional
    wrapper's argument handling cost more than the update itself for the small tensors of a batch.
    """
    step.add_(1)
    torch._fused_adam_(
        [params],
        [grads],
        [m],
        [v],
        [],
        [step],
        lr=lr,
        beta1=ADAM_BETAS[0],
        beta2=ADAM_BETAS[1],
        weight_decay=wd,
        eps=ADAM_EPS,
        amsgrad=False,
        maximize=False,
    )


class _FlatAdam:
    """Adam for the dense layers: parameters and gradients live in one flat buffer, so a step is one update."""

    def __init__(self, params: list[torch.nn.Parameter], lr: float, weight_decay: float) -> None:
        total = sum(p.numel() for p in params)
        self.flat = torch.empty(total)
        self.grad = torch.zeros(total)
        start = 0
        for p in params:
            n = p.numel()
            self.flat[start : start + n].copy_(p.detach().reshape(-1))
            p.data = self.flat[start : start + n].view_as(p)
            p.grad = self.grad[start : start + n].view_as(p)
            start += n
        self.params = params
        self.m = torch.zeros(total)
        self.v = torch.zeros(total)
        self.steps = torch.zeros((), dtype=torch.float32)
        self.lr, self.wd = lr, weight_decay

    def step(self) -> None:
        _adam_step(self.flat, self.grad, self.m, self.v, self.steps, self.lr, self.wd)

    def release(self) -> None:
        """Give every parameter its own storage again (safetensors refuses tensors that share memory)."""
        for p in self.params:
            p.data = p.data.clone()
            p.grad = None


class _RowAdam:
    """Lazy Adam for one embedding table: only the rows used by the batch are updated.

    A row's moments decay only on the steps that use it, as in ``torch.optim.SparseAdam``; the bias
    correction counts every step of the table. The cost of a step is that of the batch, not of the table.
    """

    def __init__(self, table: torch.Tensor, lr: float, weight_decay: float) -> None:
        self.table = table
        self.m = torch.zeros_like(table)
        self.v = torch.zeros_like(table)
        self.steps = torch.zeros((), dtype=torch.float32)
        self.lr, self.wd = lr, weight_decay
        # Position of each used row in the batch's list of used rows (only the used entries are ever read).
        self.slot = torch.zeros(len(table), dtype=torch.int64)
        self.positions = torch.arange(len(table))

    def step(self, ids: torch.Tensor, grad: torch.Tensor) -> None:
        # The used rows, sorted: numpy's sort of a few thousand ids took a tenth of torch.unique's time
        # (measured at 4,096 ids), and its cost does not grow with the table as a bincount's would.
        ordered = np.sort(ids.numpy())
        first = np.empty(len(ordered), dtype=bool)
        first[:1] = True
        np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
        rows = torch.from_numpy(ordered[first])
        # Sum the gradients of repeated ids into one row each.
        self.slot.index_copy_(0, rows, self.positions[: len(rows)])
        summed = grad.new_zeros((len(rows), grad.shape[1])).index_add_(0, self.slot.index_select(0, ids), grad)
        param, m, v = (t.index_select(0, rows) for t in (self.table, self.m, self.v))
        _adam_step(param, summed, m, v, self.steps, self.lr, self.wd)
        for target, values in ((self.table, param), (self.m, m), (self.v, v)):
            target.index_copy_(0, rows, values)


# --- training ----------------------------------------------------------------------------------------------------


@dataclass
class TrainResult:
    model: EntityNet
    history: list[dict]  # per epoch: epoch, train_loss, valid_loss, seconds, rows_per_second
    best_epoch: int
    best_valid_loss: float
    vectors: dict[str, np.ndarray]  # column name -> matrix (row = vocabulary id)
    seconds: float


def default_threads(cardinalities: list[int], sizes: list[int], n_dense: int, hidden: list[int]) -> int:
    """Torch threads when the spec leaves them open: 1, except 2 for wide networks on machines with 4+ cores.

    Measured on a 2-core machine shared with other work (best of short bursts, then whole epochs in
    benchmarks/bench_trainer.py): with hidden [128, 64] and 25 embedding dimensions (about 13,000
    multiply-adds per row) two threads ran at 0.95x one thread at batch 1024 and 1.14x at batch 4096; with
    727 embedding dimensions (about 103,000 multiply-adds per row) at 1.25x. Whenever other processes used
    the cores, two threads ran 4-10x slower than one (every small operation waits for the descheduled
    thread), and whole epochs of the wide network ran at 6,500-14,000 rows/s with two threads. So a machine
    with fewer than 4 cores always gets one thread. On 4 or more cores two threads are chosen for networks
    of 60,000+ multiply-adds per row; that case was not measured here. One thread also makes the vectors
    the same on machines with different core counts.
    """
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    width = sum(sizes) + n_dense
    macs_per_row = 0
    for units in [*hidden, 1]:
        macs_per_row += width * units
        width = units
    return 2 if cores >= 4 and macs_per_row >= _TWO_THREAD_MACS else 1


_TWO_THREAD_MACS = 60_000


MIN_EPOCHS = 30
MAX_EPOCHS = 2_000


def epoch_budget(training: TrainingSpec, train_rows: int) -> int:
    """Epochs a run may take: ``training.epochs`` when the spec sets it, else enough for ``training.step_budget``
    optimizer steps, at least MIN_EPOCHS (the former fixed cap) and at most MAX_EPOCHS.

    A fixed epoch cap gives a small table few optimizer steps: 7,000 rows at batch 1,024 make 6 steps an epoch,
    so 30 epochs were 180 steps and ended before early stopping did (best epoch = last epoch). Tying the budget
    to steps gives every table about the same number of updates; early stopping (``patience``) still ends the
    run when the validation loss stops falling, so the budget is an upper bound, not the usual length. Tables of
    200,000 rows and more keep the former 30-epoch cap (6,000 steps are fewer than 30 of their epochs).
    """
    if training.epochs is not None:
        return training.epochs
    steps_per_epoch = math.ceil(max(train_rows, 1) / min(training.batch_size, max(train_rows, 1)))
    return int(min(MAX_EPOCHS, max(MIN_EPOCHS, math.ceil(training.step_budget / steps_per_epoch))))


@contextmanager
def _torch_state(threads: int, seed: int) -> Iterator[None]:
    """Seed, thread count and deterministic algorithms for one training run; the caller's state comes back."""
    previous_threads = torch.get_num_threads()
    previous_deterministic = torch.are_deterministic_algorithms_enabled()
    previous_warn = torch.is_deterministic_algorithms_warn_only_enabled()
    previous_fill = torch.utils.deterministic.fill_uninitialized_memory
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        torch.set_num_threads(threads)
        torch.use_deterministic_algorithms(True, warn_only=True)
        # Deterministic mode also fills every new tensor with NaN (a debugging aid against reads of
        # uninitialized memory); the loop allocates small tensors every batch and reads none unwritten, and the
        # fills were a tenth of the batch time (measured), so they are turned off.
        torch.utils.deterministic.fill_uninitialized_memory = False
        try:
            yield
        finally:
            torch.set_num_threads(previous_threads)
            torch.use_deterministic_algorithms(previous_deterministic, warn_only=previous_warn)
            torch.utils.deterministic.fill_uninitialized_memory = previous_fill


def _loss(raw: torch.Tensor, target: torch.Tensor, task: str) -> torch.Tensor:
    if task == "binary":
        return F.binary_cross_entropy_with_logits(raw, target)
    return F.mse_loss(raw, target)


def _holdout(n: int, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Seeded split of n rows into (train, valid) positions for early stopping."""
    if n < 2:
        raise ValueError(f"training needs at least 2 rows to hold some out for early stopping, got {n}")
    n_valid = min(max(1, int(round(n * fraction))), n - 1)
    order = np.random.default_rng(seed).permutation(n)
    return np.sort(order[n_valid:]), np.sort(order[:n_valid])


class _Tensors:
    """Inputs as torch tensors: ids column-major (one contiguous row of ids per embedded column)."""

    def __init__(self, inputs: EncodedInputs, y: np.ndarray) -> None:
        self.ids = torch.from_numpy(np.ascontiguousarray(inputs.cat_ids.T))
        self.dense = torch.from_numpy(np.ascontiguousarray(inputs.dense, dtype=np.float32))
        self.y = torch.from_numpy(np.ascontiguousarray(y, dtype=np.float32))

    def __len__(self) -> int:
        return len(self.y)

    def permuted(self, order: torch.Tensor, into: _Tensors | None = None) -> _Tensors:
        """The rows in ``order``, written into ``into`` when given (reusing its memory) or into new tensors.

        Reusing the memory matters: gathering a million rows into fresh tensors took twice as long as into
        tensors already mapped (measured; the difference is the page faults of the new allocation).
        """
        if into is None:
            into = object.__new__(_Tensors)
            into.ids, into.dense, into.y = (torch.empty_like(t) for t in (self.ids, self.dense, self.y))
        for j in range(len(self.ids)):  # one id row at a time: faster than index_select along dim 1 (measured)
            torch.index_select(self.ids[j], 0, order, out=into.ids[j])
        torch.index_select(self.dense, 0, order, out=into.dense)
        torch.index_select(self.y, 0, order, out=into.y)
        return into


def _check_inputs(inputs: EncodedInputs, y: np.ndarray, cardinalities: list[int], what: str) -> None:
    if len(inputs) != len(y):
        raise ValueError(f"{what}: {len(inputs)} input rows but {len(y)} targets")
    if inputs.cat_ids.shape[1] != len(cardinalities):
        raise ValueError(f"{what}: {inputs.cat_ids.shape[1]} id columns for {len(cardinalities)} embedded columns")
    if len(inputs):
        low, high = inputs.cat_ids.min(axis=0), inputs.cat_ids.max(axis=0)
        for j, card in enumerate(cardinalities):
            if low[j] < 0 or high[j] >= card:
                raise ValueError(
                    f"{what}: ids of embedded column {j} lie in [{low[j]}, {high[j]}], outside [0, {card})"
                )
    if not np.all(np.isfinite(y)):
        raise ValueError(f"{what}: the target has missing or infinite values")
    if not np.all(np.isfinite(inputs.dense)):
        raise ValueError(f"{what}: the dense inputs have missing or infinite values")


def _evaluate(model: EntityNet, data: _Tensors, task: str) -> float:
    """Mean loss over all rows (raw scale), computed without gradients in large slices."""
    total = 0.0
    with torch.no_grad():
        for start in range(0, len(data), _EVAL_SLICE):
            stop = start + _EVAL_SLICE
            x = torch.cat([model.embed(data.ids[:, start:stop].T), data.dense[start:stop]], 1)
            raw = model.head(x)
            total += float(_loss(raw, data.y[start:stop], task)) * len(raw)
    return total / max(len(data), 1)


def _progress(enabled: bool):
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(
        TextColumn("[bold]{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("{task.fields[status]}"),
        TimeRemainingColumn(),
        disable=not enabled,
        transient=False,
        console=Console(stderr=True),
    )


def fit_network(
    inputs: EncodedInputs,
    y: np.ndarray,
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
    valid: tuple[EncodedInputs, np.ndarray] | None = None,
    init_vectors: dict[str, np.ndarray] | None = None,
    label: str = "training",
) -> TrainResult:
    """Train the network and return it with its vectors and per-epoch history.

    ``y`` is on the transformed scale (regression) or 0/1 (binary). Without ``valid``, a seeded
    ``training.validation_fraction`` of the rows is held out for early stopping. Training runs at most
    ``epoch_budget`` epochs and stops after ``training.patience`` epochs without a lower validation loss; the
    weights of the best epoch are restored. ``init_vectors`` warm-starts tables column by column (rows beyond a
    given matrix keep their random start, so a vocabulary that grew still trains its new rows).
    """
    started = time.perf_counter()
    if task not in ("regression", "binary"):
        raise ValueError(f"task must be 'regression' or 'binary', got {task!r}")
    if not (len(columns) == len(cardinalities) == len(sizes)):
        raise ValueError(f"{len(columns)} columns, {len(cardinalities)} cardinalities and {len(sizes)} sizes")
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    _check_inputs(inputs, y, cardinalities, "training rows")
    if task == "binary" and not np.all((y == 0) | (y == 1)):
        raise ValueError("a binary target must be 0 or 1 on every row")
    if valid is None:
        train_rows, valid_rows = _holdout(len(y), training.validation_fraction, training.seed)
        valid = (inputs.take(valid_rows), y[valid_rows])
        inputs, y = inputs.take(train_rows), y[train_rows]
    else:
        valid = (valid[0], np.asarray(valid[1], dtype=np.float64).reshape(-1))
        _check_inputs(valid[0], valid[1], cardinalities, "validation rows")
    if len(y) == 0 or len(valid[1]) == 0:
        raise ValueError("training needs at least one training row and one validation row")

    # Regression learns a standardized target (Adam's step size is then on the scale of the output);
    # the shift and scale are kept in the network so that it predicts on the transformed scale.
    if task == "regression":
        shift, scale = float(y.mean()), float(y.std())
        scale = scale if scale > 0 and math.isfinite(scale) else 1.0
    else:
        shift, scale = 0.0, 1.0
    train_data = _Tensors(inputs, (y - shift) / scale)
    valid_data = _Tensors(valid[0], (valid[1] - shift) / scale)
    n_dense = inputs.dense.shape[1]
    threads = training.threads or default_threads(cardinalities, sizes, n_dense, training.hidden)

    with _torch_state(threads, training.seed):
        model = EntityNet(cardinalities, sizes, n_dense, training.hidden, training.dropout)
        model.target_shift.fill_(shift)
        model.target_scale.fill_(scale)
        with torch.no_grad():
            if task == "binary":
                # Start from the base rate, so the first epochs learn structure rather than the mean.
                rate = min(max(float(y.mean()), 1e-6), 1 - 1e-6)
                model.output.bias.fill_(math.log(rate / (1 - rate)))
            for j, column in enumerate(columns):
                if init_vectors and column in init_vectors:
                    _warm_start(model.embeddings[j].weight, np.asarray(init_vectors[column]), column)
        history, best_epoch, best_loss = _train_loop(model, train_data, valid_data, training, task, label)
    loss_scale = scale**2 if task == "regression" else 1.0
    for row in history:
        row["train_loss"] *= loss_scale
        row["valid_loss"] *= loss_scale
    model.eval()
    vectors = dict(zip(columns, model.vectors(), strict=True))
    return TrainResult(
        model=model,
        history=history,
        best_epoch=best_epoch,
        best_valid_loss=best_loss * loss_scale,
        vectors=vectors,
        seconds=time.perf_counter() - started,
    )


def _warm_start(weight: torch.Tensor, matrix: np.ndarray, column: str) -> None:
    if matrix.ndim != 2 or matrix.shape[1] != weight.shape[1]:
        raise ValueError(
            f"init vectors of {column!r} have shape {matrix.shape}, the table needs width {weight.shape[1]}"
        )
    rows = min(len(matrix), len(weight))
    weight[:rows] = torch.from_numpy(np.ascontiguousarray(matrix[:rows], dtype=np.float32))


class _Passes:
    """Forward and backward of the dense layers by hand, on buffers allocated once per training run.

    Autograd would build a graph, allocate every activation and gradient anew and zero the gradients each
    batch; here each matrix product writes into its buffer (``out=``) and the weight gradients land straight
    in the flat buffer of the dense optimizer.
    """

    def __init__(self, model: EntityNet, batch: int, embedded: int, width: int) -> None:
        self.linears = [*model.layers, model.output]
        self.dropout = model.dropout
        self.embedded = embedded
        self.x = torch.empty((batch, width))
        self.acts = [torch.empty((batch, layer.out_features)) for layer in self.linears]
        self.grads = [torch.empty((batch, layer.out_features)) for layer in self.linears]
        self.keep = [torch.empty((batch, layer.out_features)) for layer in model.layers] if self.dropout > 0 else []
        self.emb_grad = torch.empty((batch, embedded))

    def forward(self, n: int) -> torch.Tensor:
        """The raw output of the first n rows of ``self.x``, shape (n, 1)."""
        h = self.x[:n]
        last = len(self.linears) - 1
        for i, layer in enumerate(self.linears):
            out = torch.addmm(layer.bias, h, layer.weight.t(), out=self.acts[i][:n])
            if i < last:
                out.relu_()
                if self.keep:
                    keep = self.keep[i][:n].bernoulli_(1.0 - self.dropout).div_(1.0 - self.dropout)
                    out.mul_(keep)
            h = out
        return h

    def backward(self, n: int, grad_out: torch.Tensor) -> torch.Tensor:
        """Weight and bias gradients into the layers' ``.grad``; returns the gradient of the looked-up vectors."""
        g = grad_out
        for i in range(len(self.linears) - 1, -1, -1):
            layer = self.linears[i]
            below = self.acts[i - 1][:n] if i > 0 else self.x[:n]
            torch.mm(g.t(), below, out=layer.weight.grad)
            torch.sum(g, 0, out=layer.bias.grad)
            if i > 0:
                g_below = torch.mm(g, layer.weight, out=self.grads[i - 1][:n])
                if self.keep:
                    g_below.mul_(self.keep[i - 1][:n])
                # ReLU's derivative: the gradient passes where the layer's output is positive.
                torch.ops.aten.threshold_backward.grad_input(g_below, below, 0, grad_input=g_below)
                g = g_below
        if self.embedded:
            return torch.mm(g, self.linears[0].weight[:, : self.embedded], out=self.emb_grad[:n])
        return self.emb_grad[:n]


def _loss_and_grad(raw: torch.Tensor, target: torch.Tensor, task: str, grad: torch.Tensor) -> torch.Tensor:
    """Summed loss of the rows (a 0-d tensor) and, into ``grad``, the gradient of the mean loss w.r.t. ``raw``."""
    n = len(raw)
    target = target.unsqueeze(1)
    if task == "binary":
        total = F.binary_cross_entropy_with_logits(raw, target, reduction="sum")
        torch.sigmoid(raw, out=grad).sub_(target).mul_(1.0 / n)
        return total
    torch.sub(raw, target, out=grad)
    flat = grad.view(-1)
    total = torch.dot(flat, flat)
    grad.mul_(2.0 / n)
    return total


def _train_loop(
    model: EntityNet, train: _Tensors, valid: _Tensors, training: TrainingSpec, task: str, label: str
) -> tuple[list[dict], int, float]:
    n = len(train)
    batch = min(training.batch_size, n)
    tables = [table.weight for table in model.embeddings]
    dense_params = [p for name, p in model.named_parameters() if not name.startswith("embeddings.")]
    dense_opt = _FlatAdam(dense_params, training.learning_rate, training.weight_decay)
    row_opts = [_RowAdam(w, training.learning_rate, training.weight_decay) for w in tables]
    offsets = np.cumsum([0, *model.sizes]).tolist()
    shuffler = torch.Generator().manual_seed(training.seed)

    best_loss, best_epoch, best_state, waited = math.inf, 0, None, 0
    history: list[dict] = []
    # On standard error, so standard output stays clean for scripts; off when entivec's output is quiet.
    interactive = training.progress and progress.level() != "quiet" and sys.stderr.isatty()
    batches_per_epoch = math.ceil(n / batch)
    epochs = epoch_budget(training, n)
    embedded = offsets[-1]
    width = embedded + train.dense.shape[1]
    passes = _Passes(model, batch, embedded, width)
    grad_out = torch.empty((batch, 1))
    data = None
    try:
        with _progress(interactive) as bar, torch.no_grad():
            bar_task = bar.add_task(label, total=epochs * batches_per_epoch, status="")
            for epoch in range(1, epochs + 1):
                tick = time.perf_counter()
                lines = progress.begin(f"{label} epoch {epoch}") if training.progress and not interactive else None
                model.train()
                data = train.permuted(torch.randperm(n, generator=shuffler), into=data)
                total = torch.zeros(())
                for b in range(batches_per_epoch):
                    start, stop = b * batch, min((b + 1) * batch, n)
                    rows = stop - start
                    ids = data.ids[:, start:stop]
                    # The network's input row: looked-up vectors, then the dense columns. Gathering straight into
                    # the columns of x beat gathering into separate buffers and concatenating (measured).
                    x = passes.x[:rows]
                    for j, weight in enumerate(tables):
                        torch.index_select(weight, 0, ids[j], out=x[:, offsets[j] : offsets[j + 1]])
                    x[:, embedded:] = data.dense[start:stop]
                    raw = passes.forward(rows)
                    total += _loss_and_grad(raw, data.y[start:stop], task, grad_out[:rows])
                    emb_grad = passes.backward(rows, grad_out[:rows])
                    dense_opt.step()
                    for j, opt in enumerate(row_opts):
                        opt.step(ids[j], emb_grad[:, offsets[j] : offsets[j + 1]])
                    if b % _PROGRESS_EVERY == _PROGRESS_EVERY - 1:
                        bar.advance(bar_task, _PROGRESS_EVERY)
                train_loss = float(total) / n
                model.eval()
                valid_loss = _evaluate(model, valid, task)
                seconds = time.perf_counter() - tick
                history.append(
                    {
                        "epoch": epoch,
                        "train_loss": train_loss,
                        "valid_loss": valid_loss,
                        "seconds": seconds,
                        "rows_per_second": n / seconds if seconds > 0 else float("inf"),
                    }
                )
                if not math.isfinite(train_loss):
                    raise FloatingPointError(
                        f"{label}: the training loss became {train_loss} in epoch {epoch}; lower training.learning_rate"
                    )
                if valid_loss < best_loss:
                    best_loss, best_epoch, waited = valid_loss, epoch, 0
                    best_state = {k: t.detach().clone() for k, t in model.state_dict().items()}
                else:
                    waited += 1
                if lines is not None:  # no bar (a log, a pipe): one line per epoch instead
                    lines.end(n, f"best epoch {best_epoch}")
                bar.update(
                    bar_task,
                    completed=epoch * batches_per_epoch,
                    status=f"epoch {epoch}: valid {valid_loss:.4g} (best {best_loss:.4g} @ {best_epoch})",
                )
                if waited >= training.patience:
                    break
    finally:
        dense_opt.release()
    if best_state is not None:
        model.load_state_dict(best_state)
    return history, best_epoch, best_loss



# The Prefect task is the plain function itself; no retries, since nothing in it is I/O that could heal.
train_vectors = task(name="train-vectors", cache_policy=NO_CACHE)(fit_network)
