"""Out-of-fold vectors for downstream training rows: one network per fold, aligned to the full-data vectors.

``cross_fit_vectors`` is the one way to get them. Called from a flow body it submits one ``fit-fold`` task per
fold to the flow's task runner (a Dask cluster with ``entivec.flows.parallel``) and then aligns and assembles
the results in the flow; called anywhere else it trains the folds one after another. Tasks submitted from
inside another task would not reach the flow's task runner, hence a plain function, not a task.

Each fold's network is seeded with ``training.seed`` and trains with a fixed thread count (see
``tasks/train/trainer.py``: ``fit_network``), so where and in which order a fold runs does not change its vectors.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Sequence

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE
from sklearn.model_selection import KFold, StratifiedKFold

from entivec.schemas.spec import Spec, TrainingSpec
from entivec.tasks.evidence.align import align_to
from entivec.tasks.evidence.confidence import FoldSpread
from entivec.tasks.train.encoder import EncodedInputs
from entivec.tasks.train.trainer import fit_network


def fold_splitter(task: str, folds: int, seed: int) -> KFold | StratifiedKFold:
    """The folds used for cross-fitting: KFold for regression, StratifiedKFold for binary, shuffled with seed."""
    if task == "regression":
        return KFold(n_splits=folds, shuffle=True, random_state=seed)
    if task == "binary":
        return StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    raise ValueError(f"unknown task {task!r}; expected 'regression' or 'binary'")


def _id_matrix(cat_ids: np.ndarray, columns: list[str]) -> np.ndarray:
    ids = np.asarray(cat_ids)
    if ids.ndim == 1 and len(columns) == 1:
        ids = ids[:, None]
    if ids.ndim != 2 or ids.shape[1] != len(columns):
        raise ValueError(f"cat_ids must have one column per embedded column ({len(columns)}), got {ids.shape}")
    if not np.issubdtype(ids.dtype, np.integer):
        raise ValueError("cat_ids must be integer vocabulary ids")
    if ids.size and ids.min() < 0:
        raise ValueError("cat_ids must not be negative (0 is the unknown id)")
    return ids.astype(np.int64, copy=False)


def vectors_for_ids(cat_ids: np.ndarray, matrices: dict[str, np.ndarray], columns: list[str]) -> dict[str, np.ndarray]:
    """Per column, the rows of its vector matrix picked by the ids: (n_rows, dim) each."""
    ids = _id_matrix(cat_ids, columns)
    out = {}
    for j, col in enumerate(columns):
        matrix = np.asarray(matrices[col])
        if ids.size and ids[:, j].max() >= matrix.shape[0]:
            raise ValueError(f"column {col!r}: id {ids[:, j].max()} is beyond its {matrix.shape[0]} vector rows")
        out[col] = matrix[ids[:, j]]
    return out


def out_of_fold_vectors(
    cat_ids: np.ndarray,
    y: np.ndarray,
    *,
    columns: list[str],
    folds: int,
    seed: int,
    fit_fold: Callable[[np.ndarray], dict[str, np.ndarray]] | None = None,
    reference: dict[str, np.ndarray],
    task: str,
    fit_folds: Callable[[list[np.ndarray]], Sequence[dict[str, np.ndarray]]] | None = None,
    spread: FoldSpread | None = None,
    keep: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Vectors for downstream training rows, each from a network that never saw that row's target.

    ``cat_ids`` is (n_train, k): the vocabulary ids of the rows, one column per name in ``columns``.
    For each fold (see ``fold_splitter``), ``fit_fold(train_row_indices)`` trains on the other folds' rows only
    and returns a vector matrix per column, with the same vocabulary rows as ``reference`` (the full-data
    vectors). Each matrix is rotated onto ``reference`` with ``align_to``, fitted on the categories that occur
    in that fold's training rows (the only rows the fold's network learned; row 0 excluded). The fold's rows
    then take their vectors from it.

    A category that does not occur in the fold's training rows (e.g. one seen once in all the data) gets the
    fold's unknown row (id 0), just as a category never seen in training gets the unknown row when vectors are
    applied to new data: its own target must not reach its own vector. ``sklearn.preprocessing.TargetEncoder``
    does the same with its fallback to the overall mean.

    ``fit_folds`` may replace ``fit_fold``: it gets every fold's training rows at once, in fold order, and
    returns their matrices in the same order, so the folds can be trained in parallel (``cross_fit_vectors``);
    the assembly is the same either way.

    ``spread`` (a ``confidence.FoldSpread``) collects, fold by fold, how far each category's aligned fold vector
    lies from its full-data vector: the per-category confidence of the vector set. ``keep`` (sorted row
    positions) returns the vectors of those rows only, so the folds can train on every row while the memory of
    the result stays that of the downstream sample.

    Returns per column an array (n_train, dim) (or (len(keep), dim)), float64.
    """
    if (fit_fold is None) == (fit_folds is None):
        raise ValueError("give exactly one of fit_fold and fit_folds")
    ids = _id_matrix(cat_ids, columns)
    n = ids.shape[0]
    y = np.asarray(y).reshape(-1)
    if y.shape[0] != n:
        raise ValueError(f"cat_ids has {n} rows but y has {y.shape[0]}")
    missing = [c for c in columns if c not in reference]
    if missing:
        raise ValueError(f"no reference vectors for column(s) {missing}")
    refs = {c: np.asarray(reference[c], dtype=np.float64) for c in columns}
    for j, col in enumerate(columns):
        if n and ids[:, j].max() >= refs[col].shape[0]:
            raise ValueError(f"column {col!r}: id {ids[:, j].max()} is beyond its {refs[col].shape[0]} vector rows")
    keep = np.arange(n) if keep is None else np.asarray(keep, dtype=np.int64)
    if keep.size and (keep.min() < 0 or keep.max() >= n or np.any(np.diff(keep) <= 0)):
        raise ValueError("keep must be sorted, distinct row positions of cat_ids")
    slot = np.full(n, -1, dtype=np.int64)  # row position -> its row in the output (-1: not returned)
    slot[keep] = np.arange(keep.size)
    out = {c: np.full((keep.size, refs[c].shape[1]), np.nan) for c in columns}
    covered = np.zeros(n, dtype=np.int64)

    splits = list(fold_splitter(task, folds, seed).split(np.zeros((n, 1)), y))
    if fit_folds is not None:
        fitted = list(fit_folds([train_rows for train_rows, _ in splits]))
        if len(fitted) != len(splits):
            raise ValueError(f"fit_folds returned {len(fitted)} results for {len(splits)} folds")
    else:  # one fold at a time: only one fold's network is alive at once
        fitted = (fit_fold(train_rows) for train_rows, _ in splits)
    for (train_rows, held_rows), fold_mats in zip(splits, fitted, strict=False):
        for j, col in enumerate(columns):
            if col not in fold_mats:
                raise ValueError(f"fit_fold returned no vectors for column {col!r}")
            mat = np.asarray(fold_mats[col], dtype=np.float64)
            if mat.shape != refs[col].shape:
                raise ValueError(
                    f"column {col!r}: fit_fold returned a {mat.shape} matrix, the reference is {refs[col].shape}; "
                    "each fold must be trained against the full-data vocabulary"
                )
            learned = np.zeros(mat.shape[0], dtype=bool)
            learned[ids[train_rows, j]] = True
            learned[0] = False
            aligned = align_to(mat, refs[col], rows=learned if learned.any() else None)
            if spread is not None:  # the unknown row counts where the fold saw rare or missing rows
                spread.add(col, mat, refs[col], np.bincount(ids[train_rows, j], minlength=mat.shape[0]))
            wanted = held_rows[slot[held_rows] >= 0]
            held_ids = ids[wanted, j]
            out[col][slot[wanted]] = aligned[np.where(learned[held_ids], held_ids, 0)]
        covered[held_rows] += 1
        if spread is not None:
            spread.folds += 1
    if not (covered == 1).all():  # a splitter that repeats or skips rows would leak or leave holes
        raise RuntimeError("the folds did not cover every training row exactly once")
    return out


# fit_network seeds torch's global random generator and sets torch's process-wide thread count for the length
# of a run, so two fits in threads of one process would disturb each other. Runners that use threads (Prefect's
# default thread pool, a Dask worker with several threads) therefore train one network at a time per process.
TORCH_LOCK = threading.Lock()


def fit_fold(
    inputs: EncodedInputs,
    y: np.ndarray,
    rows: np.ndarray,
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
    fold: int = 0,
) -> dict[str, np.ndarray]:
    """Train one network on ``rows`` of ``inputs``/``y`` (without progress output); its vector matrices.

    Fold ``fold`` is seeded with ``training.seed + 1 + fold``: each fold network starts from its own random
    tables. With one shared start, a category a fold barely trained on would keep nearly the same starting
    vector in every fold, and its vectors would agree for lack of data, not because the data fix them (measured
    on nycflights13 planes: the rarest looked the most certain). Distinct starts make the spread of a category's
    fold vectors (``confidence.FoldSpread``) include what its start leaves undecided.
    """
    quiet = training.model_copy(update={"progress": False, "seed": training.seed + 1 + fold})
    with TORCH_LOCK:
        result = fit_network(
            inputs.take(rows), np.asarray(y)[rows], columns=columns, cardinalities=cardinalities, sizes=sizes,
            training=quiet, task=task, label="cross-fitting",
        )
    return result.vectors


fit_fold_task = task(name="fit-fold", cache_policy=NO_CACHE)(fit_fold)


def submit_folds(
    inputs: EncodedInputs,
    y: np.ndarray,
    fold_rows: list[np.ndarray],
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
) -> list:
    """One submitted ``fit-fold`` task per entry of ``fold_rows``; call from a flow body. Returns the futures.

    Only plain arrays and the (small) training settings travel with each task, never a closure.
    """
    return [
        fit_fold_task.with_options(task_run_name=f"fit-fold-{i}").submit(
            inputs, y, rows, columns=columns, cardinalities=cardinalities, sizes=sizes, training=training, task=task,
            fold=i,
        )
        for i, rows in enumerate(fold_rows)
    ]


def cross_fit_vectors(
    inputs: EncodedInputs,
    y: np.ndarray,
    spec: Spec,
    cardinalities: list[int],
    sizes: list[int],
    reference: dict[str, np.ndarray],
    *,
    spread: FoldSpread | None = None,
    keep: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Per embedded column, an (n_train, dim) array whose row i comes from a network that never saw row i.

    ``spread`` and ``keep`` are passed to ``out_of_fold_vectors`` (per-category confidence; only some rows back).

    Called from a flow body, every fold is submitted to the flow's task runner at once (in parallel on a Dask
    task runner; one after another on Prefect's default thread pool, see ``TORCH_LOCK``). Called anywhere else,
    the folds train one after another in this process. The vectors are the same bit for bit either way.
    """
    from prefect.context import FlowRunContext, TaskRunContext

    y = np.asarray(y)
    settings = dict(
        columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes, training=spec.training,
        task=spec.target.task,
    )
    # Tasks submitted inside a task would not reach the flow's task runner: only a flow body submits.
    in_flow_body = FlowRunContext.get() is not None and TaskRunContext.get() is None

    def fit_folds(fold_rows: list[np.ndarray]) -> list[dict[str, np.ndarray]]:
        if in_flow_body:
            return [future.result() for future in submit_folds(inputs, y, fold_rows, **settings)]
        return [fit_fold(inputs, y, rows, **settings, fold=i) for i, rows in enumerate(fold_rows)]

    return out_of_fold_vectors(
        inputs.cat_ids, y, columns=spec.embed_names, folds=spec.evaluation.folds, seed=spec.evaluation.seed,
        fit_folds=fit_folds, reference=reference, task=spec.target.task, spread=spread, keep=keep,
    )
