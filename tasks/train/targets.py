"""The spec's target transform, both ways: models learn on the transformed scale, metrics use the original."""

from __future__ import annotations

import numpy as np


def forward(y: np.ndarray, transform: str) -> np.ndarray:
    y = np.asarray(y, dtype=np.float64)
    if transform == "none":
        return y
    if transform == "log":
        if np.any(y <= 0):
            raise ValueError("target transform 'log' needs a target above 0 on every row; use 'log1p' or a range rule")
        return np.log(y)
    if transform == "log1p":
        if np.any(y <= -1):
            raise ValueError("target transform 'log1p' needs a target above -1 on every row")
        return np.log1p(y)
    raise ValueError(f"unknown target transform {transform!r}")


def inverse(z: np.ndarray, transform: str) -> np.ndarray:
    z = np.asarray(z, dtype=np.float64)
    if transform == "none":
        return z
    if transform == "log":
        return np.exp(z)
    if transform == "log1p":
        return np.expm1(z)
    raise ValueError(f"unknown target transform {transform!r}")


# Our own floor, not a standard: enough training rows for the network's early-stopping hold-out and for each
# cross-fitting fold to train on more than a handful of rows.
MIN_TRAIN_ROWS = 10


def check_learnable(train_y: np.ndarray, test_y: np.ndarray, *, column: str, task: str, folds: int,
                    files: list[str]) -> None:
    """Refuse data that is valid row by row but leaves nothing to learn or judge, with a message naming the files
    and the target column; raises InputError (exit 2 at the command line), before any training."""

    train_y = np.asarray(train_y, dtype=np.float64)
    check_learnable_values(len(train_y), len(test_y), np.unique(train_y[~np.isnan(train_y)]),
                           np.unique(np.asarray(test_y, dtype=np.float64)), column=column, task=task, folds=folds,
                           files=files)


def distinct_values(blocks, at_most: int = 2) -> np.ndarray:
    """Up to ``at_most`` of the smallest distinct non-missing values of arrays given block by block: all that
    :func:`check_learnable_values` needs, without holding a column of a table that does not fit in memory."""
    found = np.zeros(0)
    for block in blocks:
        block = np.asarray(block, dtype=np.float64)
        found = np.unique(np.concatenate([found, np.unique(block[~np.isnan(block)])[:at_most]]))[:at_most]
    return found


def check_learnable_values(n_train: int, n_test: int, values: np.ndarray, held: np.ndarray, *, column: str,
                           task: str, folds: int, files: list[str]) -> None:
    """:func:`check_learnable` on row counts and the distinct training (``values``) and held-out (``held``) targets,
    sorted; two of each are enough to decide."""
    from entivec.tasks.ingest.read import InputError

    where = ", ".join(files[:3]) + (" …" if len(files) > 3 else "")
    floor = max(MIN_TRAIN_ROWS, 2 * folds)
    if n_train < floor or n_test < 1:
        raise InputError(
            f"{where}: {n_train + n_test} row(s) left after cleaning ({n_train} to train on, "
            f"{n_test} held out); training needs at least {floor} training rows (evaluation.folds = {folds}) "
            "and one held-out row")
    if task == "binary":
        if len(values) < 2:
            raise InputError(
                f"{where}: target column {column!r} (spec key target.column) holds one class only in the training "
                f"rows (every value {values[0]:g}); a binary target needs rows of both 0 and 1")
        if len(held) < 2:
            raise InputError(
                f"{where}: target column {column!r} holds one class only in the {n_test} held-out row(s); "
                "the held-out metrics need both classes (more rows, or a different split)")
    elif len(values) < 2:
        raise InputError(
            f"{where}: target column {column!r} (spec key target.column) has the same value ({values[0]:g}) on "
            "every training row; there is nothing for the vectors to learn")
