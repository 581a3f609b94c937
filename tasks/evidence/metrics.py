"""Metrics for held-out predictions: regression and binary, whole-array numpy, lower-is-better primary metrics."""

from __future__ import annotations

import numpy as np
import pandas as pd

# The metric each task is judged by; lower is better for both.
PRIMARY = {"regression": "rmse", "binary": "log_loss"}

# Floors, chosen to agree with scikit-learn 1.6-1.9 so the same predictions give the same numbers:
# MAPE divides by max(|y|, float64 eps); log loss clips probabilities to [eps, 1 - eps] for float64.
_EPS = float(np.finfo(np.float64).eps)


def _pair(y_true, y_pred) -> tuple[np.ndarray, np.ndarray]:
    t = np.asarray(y_true, dtype=np.float64).reshape(-1)
    p = np.asarray(y_pred, dtype=np.float64).reshape(-1)
    if t.shape != p.shape:
        raise ValueError(f"y_true has {t.size} rows but the predictions have {p.size}")
    if t.size == 0:
        raise ValueError("no rows to score")
    if not (np.isfinite(t).all() and np.isfinite(p).all()):
        raise ValueError("targets and predictions must be finite (no NaN or infinity)")
    return t, p


def _binary_labels(y_true) -> np.ndarray:
    t = np.asarray(y_true, dtype=np.float64).reshape(-1)
    if not np.isin(t, (0.0, 1.0)).all():
        raise ValueError("a binary target must hold only 0 and 1 (or False and True)")
    return t


def regression_metrics(y_true, y_pred) -> dict[str, float]:
    """MSE, RMSE, MAE, R² and MAPE of predictions on the original scale of the target.

    Definitions follow scikit-learn's ``sklearn.metrics`` (and the textbook ones):

    - ``r2`` = 1 - SS_res / SS_tot. When every target is equal (SS_tot = 0) it is 1.0 for a perfect prediction
      and 0.0 otherwise, as scikit-learn's ``r2_score`` does by default (``force_finite=True``).
    - ``mape`` is a fraction, not a percentage: mean(|y - ŷ| / max(|y|, eps)) with eps the float64 machine
      epsilon, exactly as ``mean_absolute_percentage_error``. Rows with y = 0 are NOT left out: they divide by
      eps and make MAPE enormous, which is scikit-learn's documented behaviour and an honest warning that MAPE
      does not suit targets that can be zero (judge such targets by RMSE or MAE instead).
    """
    t, p = _pair(y_true, y_pred)
    err = p - t
    mse = float(np.mean(err**2))
    ss_res = float(np.sum(err**2))
    ss_tot = float(np.sum((t - t.mean()) ** 2))
    if ss_tot > 0:
        r2 = 1.0 - ss_res / ss_tot
    else:
        r2 = 1.0 if ss_res == 0 else 0.0
    return {
        "mse": mse,
        "rmse": float(np.sqrt(mse)),
        "mae": float(np.mean(np.abs(err))),
        "r2": float(r2),
        "mape": float(np.mean(np.abs(err) / np.maximum(np.abs(t), _EPS))),
    }


def _roc_auc(t: np.ndarray, p: np.ndarray) -> float:
    """Area under the ROC curve by the Mann-Whitney rank sum (ties count one half); NaN with one class only."""
    n_pos = float(t.sum())
    n_neg = float(t.size - n_pos)
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    ranks = pd.Series(p).rank(method="average").to_numpy()  # average ranks give ties half credit
    return float((ranks[t == 1].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg))


def binary_metrics(y_true, p_pred) -> dict[str, float]:
    """Log loss, ROC AUC and accuracy of predicted probabilities of class 1.

    - ``log_loss``: natural-log cross-entropy with probabilities clipped to [eps, 1 - eps] (float64 eps), as
      scikit-learn's ``log_loss`` does.
    - ``roc_auc``: NaN when the rows hold one class only (scikit-learn raises there instead).
    - ``accuracy``: a row counts as class 1 when p > 0.5, the rule scikit-learn's classifiers use in
      ``predict`` (a tie at exactly 0.5 goes to class 0).
    """
    t, p = _pair(y_true, p_pred)
    t = _binary_labels(t)
    if (p < 0).any() or (p > 1).any():
        raise ValueError("binary predictions must be probabilities in [0, 1]")
    return {
        "log_loss": float(np.mean(_row_log_loss(t, p))),
        "roc_auc": _roc_auc(t, p),
        "accuracy": float(np.mean((p > 0.5) == (t == 1))),
    }


def _row_log_loss(t: np.ndarray, p: np.ndarray) -> np.ndarray:
    # Each class's probability is clipped on its own, as scikit-learn does with its two-column form.
    p_true_class = np.where(t == 1, p, 1.0 - p)
    return -np.log(np.clip(p_true_class, _EPS, 1 - _EPS))


def task_metrics(task: str, y_true, pred) -> dict[str, float]:
    """The metrics of a task: ``regression`` (original-scale predictions) or ``binary`` (probabilities)."""
    if task == "regression":
        return regression_metrics(y_true, pred)
    if task == "binary":
        return binary_metrics(y_true, pred)
    raise ValueError(f"unknown task {task!r}; expected 'regression' or 'binary'")


def per_row_loss(task: str, y_true, pred) -> np.ndarray:
    """The loss of each row, whose mean is the task's main loss: squared error (mean = MSE) or log loss.

    Paired comparisons of two prediction sets on the same rows (e.g. a paired bootstrap) resample these.
    """
    t, p = _pair(y_true, pred)
    if task == "regression":
        return (p - t) ** 2
    if task == "binary":
        t = _binary_labels(t)
        if (p < 0).any() or (p > 1).any():
            raise ValueError("binary predictions must be probabilities in [0, 1]")
        return _row_log_loss(t, p)
    raise ValueError(f"unknown task {task!r}; expected 'regression' or 'binary'")


BOOTSTRAP_RESAMPLES = 1000


def paired_interval(
    task: str, y: np.ndarray, pred_a: np.ndarray, pred_b: np.ndarray, *, seed: int, level: float = 0.95,
    resamples: int = BOOTSTRAP_RESAMPLES,
) -> tuple[float, float, float]:
    """The primary metric of ``pred_a`` minus that of ``pred_b`` on the same rows, with a percentile interval
    from a seeded paired bootstrap over the rows (Efron & Tibshirani, "An Introduction to the Bootstrap", 1993):
    (difference, low, high). Negative: ``pred_a`` is better."""
    loss_a, loss_b = per_row_loss(task, y, pred_a), per_row_loss(task, y, pred_b)

    def metric(mean_loss):
        return np.sqrt(mean_loss) if task == "regression" else mean_loss

    difference = float(metric(loss_a.mean()) - metric(loss_b.mean()))
    rng = np.random.default_rng(seed)
    n = len(loss_a)
    diffs = np.empty(resamples)
    for start in range(0, resamples, 50):  # 50 resamples at a time: memory 50 x n indices
        stop = min(start + 50, resamples)
        idx = rng.integers(0, n, size=(stop - start, n))
        diffs[start:stop] = metric(loss_a[idx].mean(axis=1)) - metric(loss_b[idx].mean(axis=1))
    tail = (1 - level) / 2 * 100
    low, high = np.percentile(diffs, [tail, 100 - tail])
    return difference, float(low), float(high)
