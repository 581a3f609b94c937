"""
The vectors are trained on the target, so a downstream model that sees in-sample vectors of its own training
rows sees a smoothed copy of their targets: it looks better in training than it will be on new rows. As with
target encoding, the cure is cross-fitting: each downstream training row gets vectors from a network trained
without that row's fold (``out_of_fold_vectors``). Every fold's network lives in its own rotated coordinate
system, so each is rotated onto the full-data vectors (``align_to``, orthogonal Procrustes) before use; the test
rows then use the full-data vectors, which live in the same coordinates.

``compare_downstream`` fits each downstream model on the same training rows with each feature set and scores it
on the same held-out rows, beside the no-category baseline, one-hot, target encoding, and the leaky in-sample
vectors (shown so the size of the leak is visible, never used as evidence).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import sklearn
from prefect import task
from prefect.cache_policies import NO_CACHE
from sklearn.ensemble import (
    HistGradientBoostingClassifier,
    HistGradientBoostingRegressor,
    RandomForestClassifier,
    RandomForestRegressor,
)
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, OrdinalEncoder, StandardScaler, TargetEncoder
from threadpoolctl import threadpool_limits

from entivec.schemas.spec import Spec
from entivec.schemas.vocabulary import category_strings
from entivec.tasks.evidence.crossfit import fold_splitter
from entivec.tasks.evidence.metrics import BOOTSTRAP_RESAMPLES, PRIMARY, paired_interval, task_metrics
from entivec.tasks.train import targets

# Feature sets, in the order they appear in the table. Only the first three are "without vectors".
NON_VECTOR_SETS = ("baseline", "onehot", "target_encoding")
FEATURE_SETS = (*NON_VECTOR_SETS, "vectors", "vectors_in_sample")
LEAKY_SETS = frozenset({"vectors_in_sample"})
NETWORK = "network"

# A missing category value is a category of its own for one-hot and target encoding.
MISSING_CATEGORY = "<missing>"

# Histogram gradient boosting meets the "onehot" feature set as the same capped categories coded as integers,
# with its native categorical splits: the same information in one column per category column instead of up to
# onehot_max_categories dummies. Measured (benchmarks/bench_evidence.py table, 10,000 rows, 188 one-hot columns):
# the one-hot fit took 23 s of the 42 s of all downstream fits. scikit-learn's user guide recommends the native
# support over one-hot encoding for these models (histogram gradient boosting, "Categorical Features Support").
NATIVE_CATEGORIES = frozenset({"hist_gradient_boosting"})
CODES = "onehot_codes"  # the key of the coded variant in feature_sets(); never a row of the table

# Threads for scikit-learn models: the project's machines have 2 cores.
N_JOBS = 2
# OpenMP threads while fitting (hist gradient boosting is OpenMP inside). One, because OpenMP's many short
# parallel regions collapse when another process competes for the 2 cores: measured here, 8,000 rows x 23
# columns took 0.3 s on one thread and 6-12 s on two while another job was busy; idle, two threads gain little.
OPENMP_THREADS = 1


# --- the downstream comparison ----------------------------------------------------------------------------------


@dataclass
class Evidence:
    """What the downstream comparison found; the table is the evidence, the summary says it in plain words."""

    table: pd.DataFrame
    primary_metric: str
    summary: str
    vectors_help: bool
    predictions: dict[str, np.ndarray]
    y_test: np.ndarray

    def to_dict(self) -> dict:
        """JSON-safe: the table as records (NaN as null), the verdict, and the keys of the stored predictions."""
        return {
            "primary_metric": self.primary_metric,
            "vectors_help": bool(self.vectors_help),
            "summary": self.summary,
            "n_test": int(len(self.y_test)),
            "table": [{k: _json_value(v) for k, v in row.items()} for row in self.table.to_dict("records")],
            "prediction_keys": sorted(self.predictions),
        }


def _json_value(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def capped_rows(n_rows: int, max_rows: int | None, seed: int) -> np.ndarray:
    """Row positions kept for downstream training: all of them, or a seeded sample of ``max_rows`` in order."""
    if max_rows is None or n_rows <= max_rows:
        return np.arange(n_rows)
    return np.sort(np.random.default_rng(seed).choice(n_rows, size=max_rows, replace=False))


def target_values(frame: pd.DataFrame, spec: Spec, which: str) -> np.ndarray:
    """The target on its original scale: float for regression, 0/1 integers for binary.

    ``which`` names the rows in the error message ("training", "test", ...).
    """
    col = spec.target.column
    if col not in frame.columns:
        raise ValueError(f"{which} rows have no target column {col!r}")
    values = frame[col]
    if values.isna().any():
        raise ValueError(f"{which} rows: target column {col!r} has {int(values.isna().sum())} missing value(s)")
    if spec.target.task == "binary":
        y = pd.to_numeric(values.astype("object").replace({True: 1, False: 0}), errors="coerce").to_numpy(float)
        if not np.isin(y, (0.0, 1.0)).all():
            raise ValueError(f"{which} rows: binary target column {col!r} must hold only 0/1 or False/True")
        return y.astype(np.int64)
    y = pd.to_numeric(values, errors="coerce").to_numpy(np.float64)
    if not np.isfinite(y).all():
        raise ValueError(f"{which} rows: regression target column {col!r} has non-numeric or infinite values")
    return y


def _category_frame(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    return pd.DataFrame(
        {c: category_strings(frame[c]).fillna(MISSING_CATEGORY).astype(object) for c in columns},
        index=frame.index,
    )


def _onehot(max_categories: int) -> OneHotEncoder:
    # Categories beyond the cap are pooled into one "infrequent" column; a value unseen in training goes to that
    # column when it exists, and to all zeros when the column has no infrequent categories.
    return OneHotEncoder(
        max_categories=max_categories, handle_unknown="infrequent_if_exist", sparse_output=False, dtype=np.float32
    )


def _target_encoder(task: str, folds: int, seed: int) -> TargetEncoder:
    target_type = "continuous" if task == "regression" else "binary"
    major, minor = (int(p) for p in sklearn.__version__.split(".")[:2])
    if (major, minor) >= (1, 9):
        # The same kind of folds and seed as the vectors' cross-fitting.
        return TargetEncoder(target_type=target_type, cv=fold_splitter(task, folds, seed))
    return TargetEncoder(target_type=target_type, cv=folds, shuffle=True, random_state=seed)


def _stacked(parts: list[np.ndarray], n_rows: int) -> np.ndarray:
    parts = [p for p in parts if p.shape[1]]
    if not parts:
        # No numerics and no one-hot columns: a constant column makes the baseline predict the training mean.
        return np.zeros((n_rows, 1), dtype=np.float32)
    return np.hstack([p.astype(np.float32, copy=False) for p in parts])


def feature_sets(
    train: pd.DataFrame,
    test: pd.DataFrame,
    spec: Spec,
    y_fit: np.ndarray,
    vectors: dict[str, tuple[np.ndarray, np.ndarray]],
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """The downstream feature sets, each as (train matrix, test matrix), fitted on ``train`` only.

    Always ``baseline`` (numerics and one-hot columns, no embedded category), ``onehot`` and
    ``target_encoding`` (cross-fitted inside scikit-learn's TargetEncoder); then one set per entry of
    ``vectors`` (name → (train vectors, test vectors)), each added to the baseline columns; and ``onehot_codes``
    (CODES), the one-hot set's capped categories as integer codes for models with native categorical splits.
    """
    ev = spec.evaluation
    numeric = spec.numeric_names
    num_tr = (
        train[numeric].apply(pd.to_numeric, errors="coerce").to_numpy(np.float64)
        if numeric
        else np.empty((len(train), 0))
    )
    num_te = (
        test[numeric].apply(pd.to_numeric, errors="coerce").to_numpy(np.float64)
        if numeric
        else np.empty((len(test), 0))
    )
    base_tr, base_te = [num_tr], [num_te]
    if spec.onehot_names:
        enc = _onehot(ev.onehot_max_categories)
        base_tr.append(enc.fit_transform(_category_frame(train, spec.onehot_names)))
        base_te.append(enc.transform(_category_frame(test, spec.onehot_names)))

    embed_tr = _category_frame(train, spec.embed_names)
    embed_te = _category_frame(test, spec.embed_names)
    onehot = _onehot(ev.onehot_max_categories)
    oh_tr, oh_te = onehot.fit_transform(embed_tr), onehot.transform(embed_te)
    te = _target_encoder(spec.target.task, ev.folds, ev.seed)
    te_tr = te.fit_transform(embed_tr, y_fit)  # cross-fitted inside: each row is encoded without its own fold
    te_te = te.transform(embed_te)

    # The same capped categories as ordinal codes, for histogram gradient boosting's native categorical splits
    # (see NATIVE_CATEGORIES): unknown and missing values become NaN, which it treats as missing.
    codes = OrdinalEncoder(max_categories=ev.onehot_max_categories, handle_unknown="use_encoded_value",
                           unknown_value=np.nan, encoded_missing_value=np.nan, dtype=np.float32)
    code_tr, code_te = codes.fit_transform(embed_tr), codes.transform(embed_te)
    sets = {
        CODES: (_stacked([*base_tr, code_tr], len(train)), _stacked([*base_te, code_te], len(test))),
        "baseline": (_stacked(base_tr, len(train)), _stacked(base_te, len(test))),
        "onehot": (_stacked([*base_tr, oh_tr], len(train)), _stacked([*base_te, oh_te], len(test))),
        "target_encoding": (_stacked([*base_tr, te_tr], len(train)), _stacked([*base_te, te_te], len(test))),
    }
    for name, (vec_tr, vec_te) in vectors.items():
        sets[name] = (_stacked([*base_tr, vec_tr], len(train)), _stacked([*base_te, vec_te], len(test)))
    return sets


def downstream_model(name: str, task: str, seed: int):
    """A downstream model with settings chosen for speed at up to a few hundred thousand rows on 2 cores.

    - random_forest: 100 trees, leaves of at least 5 rows (smoother, smaller trees than scikit-learn's default
      of 1, and several times faster), half the columns tried at each split. Half rather than sqrt: with a few
      strong columns (a target encoding, a handful of vector dimensions) among many one-hot dummies, sqrt would
      leave the strong ones out of most splits (common practice, no source).
    - hist_gradient_boosting: scikit-learn's defaults with early stopping always on (10% of the rows held out
      inside, 10 rounds of patience, at most 300 rounds), so the behaviour does not switch at 10,000 rows.
    - linear: median imputation, standard scaling, then Ridge (alpha 1) or LogisticRegression (C 1).
    """
    regression = task == "regression"
    if name == "random_forest":
        cls = RandomForestRegressor if regression else RandomForestClassifier
        return cls(n_estimators=100, min_samples_leaf=5, max_features=0.5, n_jobs=N_JOBS, random_state=seed)
    if name == "hist_gradient_boosting":
        cls = HistGradientBoostingRegressor if regression else HistGradientBoostingClassifier
        return cls(max_iter=300, early_stopping=True, validation_fraction=0.1, n_iter_no_change=10, random_state=seed)
    if name == "linear":
        final = Ridge(alpha=1.0) if regression else LogisticRegression(C=1.0, max_iter=2000)
        return make_pipeline(SimpleImputer(strategy="median", keep_empty_features=True), StandardScaler(), final)
    raise ValueError(f"unknown downstream model {name!r}")


def predict_downstream(model, X: np.ndarray, task: str, transform: str) -> np.ndarray:
    """Predictions on the original target scale (regression) or the positive-class probability (binary)."""
    # float64 throughout: models fed float32 features may answer in float32.
    if task == "binary":
        classes = list(model.classes_)
        return np.asarray(model.predict_proba(X)[:, classes.index(1)], dtype=np.float64)
    return targets.inverse(np.asarray(model.predict(X), dtype=np.float64), transform)


def _check_vectors(name: str, vectors: dict[str, np.ndarray], columns: list[str], n_rows: int) -> np.ndarray:
    missing = [c for c in columns if c not in vectors]
    if missing:
        raise ValueError(f"{name}: no vectors for embedded column(s) {missing}")
    blocks = []
    for col in columns:
        block = np.asarray(vectors[col], dtype=np.float64)
        if block.ndim != 2 or block.shape[0] != n_rows:
            raise ValueError(f"{name}[{col!r}]: expected ({n_rows}, dim) row vectors, got shape {block.shape}")
        if not np.isfinite(block).all():
            raise ValueError(f"{name}[{col!r}]: vectors must be finite")
        blocks.append(block)
    return np.hstack(blocks)


def compare_downstream(
    train: pd.DataFrame,
    test: pd.DataFrame,
    spec: Spec,
    *,
    vectors_oof: dict[str, np.ndarray],
    vectors_in_sample: dict[str, np.ndarray],
    vectors_test: dict[str, np.ndarray],
    network_test_pred: np.ndarray | None,
    n_available: int | None = None,
    n_test_available: int | None = None,
) -> Evidence:
    """Fit every downstream model of ``spec.evaluation.models`` on every feature set; score on the same test rows.

    ``train`` and ``test`` hold the spec's columns and target; ``vectors_*`` give, per embedded column, one row
    vector per row of ``train`` (out-of-fold, and in-sample) or ``test`` (full-data vectors), in row order.
    ``network_test_pred`` is the vector network's own prediction for the test rows on the original scale
    (probabilities of class 1 for binary), or None.

    Feature sets: ``baseline`` (numerics + one-hot of ``columns.onehot``; no embedded column at all), ``onehot``
    (+ one-hot of the embedded columns, at most ``evaluation.onehot_max_categories`` columns each, rarer
    categories pooled), ``target_encoding`` (+ scikit-learn's cross-fitted ``TargetEncoder``), ``vectors``
    (+ out-of-fold vectors for training rows, full-data vectors for test rows) and ``vectors_in_sample``
    (+ in-sample vectors for training rows: leaky, shown for contrast, never evidence).

    Regression models learn the target after ``spec.target.transform`` and are scored after the inverse, on
    the original scale. When ``train`` has more than ``evaluation.max_train_rows`` rows, the models train on a
    seeded sample of that many (the table's ``n_train`` against ``n_train_available`` shows it).
    ``n_available`` / ``n_test_available`` name the rows the caller sampled ``train`` / ``test`` from, when it
    did, so the summary states the whole sample; the summary also gives a paired bootstrap confidence interval
    of the difference between the vectors and the best feature set without them over the test rows.

    ``vectors_help`` is True only when the out-of-fold vectors beat the best feature set without vectors on the
    primary metric for every downstream model. One split is not a significance test: ``predictions`` keeps
    each row's test predictions for a paired comparison.
    """
    task_kind, ev = spec.target.task, spec.evaluation
    transform = spec.target.transform if task_kind == "regression" else "none"
    primary = PRIMARY[task_kind]
    if not ev.models:
        raise ValueError("evaluation.models is empty: nothing to compare")
    absent = [c for c in spec.feature_columns if c not in train.columns or c not in test.columns]
    if absent:
        raise ValueError(f"train/test rows lack spec column(s) {absent}")
    y_train_all = target_values(train, spec, "training")
    y_test = target_values(test, spec, "test")
    columns = spec.embed_names
    oof = _check_vectors("vectors_oof", vectors_oof, columns, len(train))
    in_sample = _check_vectors("vectors_in_sample", vectors_in_sample, columns, len(train))
    vec_test = _check_vectors("vectors_test", vectors_test, columns, len(test))
    if network_test_pred is not None:
        network_test_pred = np.asarray(network_test_pred, dtype=np.float64).reshape(-1)
        if network_test_pred.shape[0] != len(test):
            raise ValueError(f"network_test_pred has {network_test_pred.shape[0]} rows, test has {len(test)}")

    keep = capped_rows(len(train), ev.max_train_rows, ev.seed)
    n_available = max(int(n_available or 0), len(train))
    n_test_available = max(int(n_test_available or 0), len(test))
    train = train.iloc[keep]
    y_train = y_train_all[keep]
    if task_kind == "binary" and np.unique(y_train).size < 2:
        raise ValueError("binary target: the training rows hold one class only; nothing to learn")
    y_fit = targets.forward(y_train, transform) if task_kind == "regression" else y_train
    sets = feature_sets(
        train,
        test,
        spec,
        y_fit,
        {"vectors": (oof[keep], vec_test), "vectors_in_sample": (in_sample[keep], vec_test)},
    )

    rows: list[dict[str, Any]] = []
    predictions: dict[str, np.ndarray] = {}
    for model_name in ev.models:
        for feature_set in FEATURE_SETS:
            X_train, X_test = sets[feature_set]
            if model_name == "linear":  # float32 is plenty for trees; linear solvers want float64 precision
                X_train, X_test = X_train.astype(np.float64), X_test.astype(np.float64)
            model = downstream_model(model_name, task_kind, ev.seed)
            if feature_set == "onehot" and model_name in NATIVE_CATEGORIES:
                X_train, X_test = sets[CODES]
                mask = np.zeros(X_train.shape[1], dtype=bool)
                mask[X_train.shape[1] - len(columns):] = True  # the coded columns come last
                model.set_params(categorical_features=mask)
            with threadpool_limits(limits=OPENMP_THREADS, user_api="openmp"):
                started = time.perf_counter()
                model.fit(X_train, y_fit)
                seconds = time.perf_counter() - started
                pred = predict_downstream(model, X_test, task_kind, transform)
            predictions[f"{model_name}/{feature_set}"] = pred
            rows.append(
                {
                    "model": model_name,
                    "features": feature_set,
                    **task_metrics(task_kind, y_test, pred),
                    "n_train": len(keep),
                    "n_train_available": n_available,
                    "n_test": len(test),
                    "n_test_available": n_test_available,
                    "n_features": X_train.shape[1],
                    "fit_seconds": seconds,
                    "leaky": feature_set in LEAKY_SETS,
                }
            )
    if network_test_pred is not None:
        predictions[f"{NETWORK}/all"] = network_test_pred
        rows.append(
            {
                "model": NETWORK,
                "features": "all",
                **task_metrics(task_kind, y_test, network_test_pred),
                "n_train": n_available,  # the network trained on the training rows before any cap
                "n_train_available": n_available,
                "n_test": len(test),
                "n_test_available": n_test_available,
                "n_features": len(spec.feature_columns),
                "fit_seconds": float("nan"),  # trained elsewhere; its time is the trainer's to report
                "leaky": False,
            }
        )
    table = pd.DataFrame(rows)
    intervals = {
        m: paired_interval(task_kind, y_test, predictions[f"{m}/vectors"], predictions[f"{m}/{best}"], seed=ev.seed)
        for m in ev.models
        for best in [str(table[(table["model"] == m) & table["features"].isin(NON_VECTOR_SETS)]
                         .set_index("features")[primary].idxmin())]
    }
    vectors_help, summary = _verdict(table, spec, primary, intervals)
    return Evidence(
        table=table,
        primary_metric=primary,
        summary=summary,
        vectors_help=vectors_help,
        predictions=predictions,
        y_test=y_test,
    )


def _verdict(
    table: pd.DataFrame, spec: Spec, primary: str, intervals: dict[str, tuple[float, float, float]] | None = None
) -> tuple[bool, str]:
    """Per model: out-of-fold vectors against the best feature set without vectors; lower is better."""
    ev = spec.evaluation
    first = table.iloc[0]
    n_train, n_available, n_test = int(first["n_train"]), int(first["n_train_available"]), int(first["n_test"])
    n_test_available = int(first.get("n_test_available", n_test))
    scale = "original target scale" if spec.target.task == "regression" else "predicted probabilities"
    sample = (
        f"a seeded sample of {n_available:,} available rows (seed {ev.seed}; evaluation.max_train_rows)"
        if n_train < n_available
        else "all training rows"
    )
    tested = (f"a seeded sample of {n_test:,} of {n_test_available:,} test rows (evaluation.max_test_rows)"
              if n_test < n_test_available else f"{n_test:,} test rows")
    lines = [
        f"Held-out evaluation on {tested}; downstream models trained on {n_train:,} rows ({sample}). "
        f"Primary metric: {primary} on the {scale} (lower is better). Intervals: 95% paired bootstrap over the "
        f"test rows ({BOOTSTRAP_RESAMPLES} resamples); they cover the test sample, not the choice of training sample."
    ]
    wins, leaky_notes = 0, []
    for model_name in ev.models:
        scores = table[table["model"] == model_name].set_index("features")[primary]
        without = scores.loc[list(NON_VECTOR_SETS)]
        best_name = str(without.idxmin())
        best, vec = float(without.min()), float(scores.loc["vectors"])
        helps = vec < best
        wins += helps
        change = f" ({abs(vec - best) / best:.1%} {'better' if helps else 'worse'})" if best > 0 and vec != best else ""
        interval = ""
        if intervals and model_name in intervals:
            diff, low, high = intervals[model_name]
            interval = f"; difference {diff:+.4g} [{low:+.4g}, {high:+.4g}]"
        lines.append(
            f"- {model_name}: vectors {vec:.6g} vs best without vectors {best:.6g} ({best_name}): "
            f"vectors {'help' if helps else 'do not help'}{change}{interval}."
        )
        leaky_notes.append(f"{model_name} {float(scores.loc['vectors_in_sample']):.6g}")
    n_models = len(ev.models)
    vectors_help = wins == n_models
    if vectors_help:
        lines.append(
            f"Verdict: the vectors help: they beat the best feature set without vectors for all {n_models} "
            "downstream model(s) on this split (check with a paired test before relying on small margins)."
        )
    else:
        lines.append(
            f"Verdict: the vectors do not help: they beat the best feature set without vectors for only {wins} "
            f"of {n_models} downstream model(s); a promotion should not rest on them."
        )
    lines.append(
        f"In-sample (leaky) vectors, for contrast only: {', '.join(leaky_notes)}. Their training rows saw vectors "
        "learned from their own targets; the gap to the out-of-fold rows shows the leak. They are never evidence."
    )
    network = table[table["model"] == NETWORK]
    if len(network):
        lines.append(f"The vector network itself: {primary} {float(network[primary].iloc[0]):.6g}.")
    lines.append(
        "Caution: vectors of places or groups (postcodes, stores, ...) can stand in for protected attributes; "
        "check what they encode before using them in decisions about people."
    )
    return vectors_help, "\n".join(lines)


# The Prefect task is the plain function itself (not cached: its inputs are whole tables).
evaluate_downstream = task(name="evaluate-downstream", cache_policy=NO_CACHE)(compare_downstream)
