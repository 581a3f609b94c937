"""The promotion gate: does a candidate version earn `production`? Evidence, checks and a verdict with figures.

What is judged, and on which rows (the honest part):

- **Rows.** Candidate and production are judged on the SAME rows: the held-out split of the newest data,
  minus every row either version trained on. A version's training rows are known from the ids its train
  run recorded (``data/train_ids.parquet``); failing that, when the version was trained on exactly this data
  (same fingerprint) with the same split settings, its held-out rows ARE these rows. A random split of a
  grown table reshuffles rows, so without either proof an earlier version may have trained on "held-out"
  rows; ``promotion.require_unseen_rows`` (default true) then fails the gate rather than judge on leaked rows.
- **Downstream.** Each version's vectors are fixed features of the judge model (``promotion.judge_model``)
  beside the numeric and one-hot columns; the no-category baseline has only those. Where the judge model is
  fitted is ``promotion.downstream_fit`` (see ``PromotionSpec``); by default it is cross-fitted on the judged
  rows themselves, so no fitting row's target ever reached the vectors. Unknown categories get row 0, as when
  vectors are applied.
- **Paired bootstrap.** The per-row loss (squared error on the original target scale for regression, log
  loss for binary: ``per_row_loss``) of the reference minus that of the candidate is resampled with
  replacement, rows kept paired; the percentile interval of the resampled means is the confidence interval
  (Efron & Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 13; the same interval as
  ``scipy.stats.bootstrap(..., paired=True, method="percentile")``). With cross-fitted predictions the rows
  are not fully independent (each fold's model is shared by its rows); the interval treats them as if they
  were, the usual practice for paired comparisons of out-of-fold predictions (common practice, no source).
- **Context, not verdict:** the same judge model with one-hot and with target encoding of the embedded
  columns (``promotion.compare_encodings``), and each version's own network (its stored weights) on the
  judged rows. Their figures are reported beside the downstream ones; they do not decide.
- **Vector sanity**, **stability against production** and the team's **expectations** are checks on the
  vectors themselves (see ``compare`` and ``PromotionSpec``).
"""

from __future__ import annotations

import contextlib
import json
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import mlflow
import numpy as np
import pandas as pd
import yaml
from mlflow.exceptions import MlflowException
from prefect import task
from prefect.cache_policies import NO_CACHE
from threadpoolctl import threadpool_limits

from entivec.schemas.promotion import NearerExpectation, OrderExpectation, PromotionSpec
from entivec.schemas.spec import Spec, SpecError, load_spec, spec_from_dict
from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import category_strings
from entivec.settings import project_home, tracking_uri
from entivec.tasks import audit, registry, targets
from entivec.tasks.compare import ColumnComparison, compare_vector_sets
from entivec.tasks.evaluate import (
    capped_rows,
    downstream_model,
    feature_sets,
    fold_splitter,
    predict_downstream,
    target_values,
)
from entivec.tasks.metrics import PRIMARY, per_row_loss, task_metrics

TRAIN_IDS_ARTIFACT = "data/train_ids.parquet"
SPEC_PATH_TAG = "entivec.spec_path"
SOURCE_TAG = "entivec.source"  # set when a run read a data drop named apart from its spec (train --source)
BASELINE = "baseline"
ENCODINGS = ("onehot", "target_encoding")  # the embedded columns without vectors, for context
CANDIDATE = "candidate"
PRODUCTION = "production"
# Fits on fewer rows than this run the judge model on one OpenMP thread (see _threads_for).
_SMALL_FIT_ROWS = 20_000
# Index matrix of one bootstrap batch: at most this many entries (8 bytes each).
_BOOTSTRAP_CELLS = 4_000_000


@dataclass
class Check:
    """One check of the gate. ``passed`` is None for figures that are measured but not judged."""

    group: str  # rows | downstream | context | network | sanity | stability | expectation
    name: str
    passed: bool | None
    message: str
    figures: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"group": self.group, "name": self.name, "passed": self.passed, "message": self.message,
                "figures": {k: _json(v) for k, v in self.figures.items()}}


def _json(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (list, tuple)):
        return [_json(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _json(v) for k, v in value.items()}
    return value


# --- the paired bootstrap ---------------------------------------------------------------------------------------


@dataclass
class PairedInterval:
    """A paired comparison of two per-row losses; ``difference`` > 0 means the candidate's loss is lower."""

    reference: str
    candidate: str
    n: int
    reference_loss: float
    candidate_loss: float
    difference: float
    low: float
    high: float
    confidence: float
    resamples: int
    seed: int
    batch: int
    distribution: np.ndarray = field(repr=False)

    def relative(self, value: float) -> float:
        """A difference as a share of the reference's mean loss."""
        return value / self.reference_loss if self.reference_loss > 0 else float("nan")

    def gain_text(self) -> str:
        """The relative gain and its interval, e.g. ``+4.10% [+2.95%, +5.20%]``."""
        rel = self.relative
        return f"{rel(self.difference):+.2%} [{rel(self.low):+.2%}, {rel(self.high):+.2%}]"

    def to_dict(self) -> dict[str, Any]:
        return _json({
            "reference": self.reference, "candidate": self.candidate, "n": self.n,
            "reference_loss": self.reference_loss, "candidate_loss": self.candidate_loss,
            "difference": self.difference, "low": self.low, "high": self.high,
            "relative_gain": self.relative(self.difference), "relative_low": self.relative(self.low),
            "relative_high": self.relative(self.high), "confidence": self.confidence,
            "resamples": self.resamples, "seed": self.seed, "batch": self.batch,
        })


def bootstrap_batch(n: int, resamples: int) -> int:
    """Resamples drawn per batch for ``n`` rows (bounded memory); reported so the draw can be reproduced."""
    return max(1, min(resamples, _BOOTSTRAP_CELLS // max(n, 1)))


def paired_bootstrap(
    loss_reference: np.ndarray,
    loss_candidate: np.ndarray,
    *,
    confidence: float = 0.95,
    resamples: int = 4000,
    seed: int = 0,
    batch: int | None = None,
    reference: str = "reference",
    candidate: str = "candidate",
) -> PairedInterval:
    """Percentile interval of the mean of ``loss_reference - loss_candidate`` over paired row resamples.

    Each resample draws n row positions with replacement (``numpy.random.default_rng(seed).integers``, in
    batches of ``batch`` resamples) and takes the mean difference over them; the interval is the
    (1 - confidence)/2 and (1 + confidence)/2 quantiles (linear interpolation) of those means.
    """
    ref = np.asarray(loss_reference, dtype=np.float64).reshape(-1)
    cand = np.asarray(loss_candidate, dtype=np.float64).reshape(-1)
    if ref.shape != cand.shape:
        raise ValueError(f"paired losses differ in length: {ref.size} and {cand.size}")
    n = ref.size
    if n < 2:
        raise ValueError("a paired bootstrap needs at least 2 rows")
    if not (np.isfinite(ref).all() and np.isfinite(cand).all()):
        raise ValueError("per-row losses must be finite")
    diff = ref - cand
    batch = batch or bootstrap_batch(n, resamples)
    rng = np.random.default_rng(seed)
    means = np.empty(resamples)
    for start in range(0, resamples, batch):
        size = min(batch, resamples - start)
        rows = rng.integers(0, n, (size, n))
        means[start : start + size] = diff[rows].mean(axis=1)
    alpha = (1.0 - confidence) / 2.0
    low, high = np.quantile(means, [alpha, 1.0 - alpha])
    return PairedInterval(
        reference=reference, candidate=candidate, n=n, reference_loss=float(ref.mean()),
        candidate_loss=float(cand.mean()), difference=float(diff.mean()), low=float(low), high=float(high),
        confidence=confidence, resamples=resamples, seed=seed, batch=batch, distribution=means,
    )


def loss_name(task_kind: str) -> str:
    """What the per-row loss of a task is, in words."""
    return "squared error (original target scale)" if task_kind == "regression" else "log loss"


def gain_check(interval: PairedInterval, margin: float, label: str) -> Check:
    """Pass when the interval's lower end clears ``margin`` x the reference's mean loss."""
    needed = margin * interval.reference_loss
    passed = bool(interval.low > needed)
    pct = 100 * interval.confidence
    rel = interval.relative
    message = (
        f"candidate vs {label}: mean loss {interval.candidate_loss:.6g} vs {interval.reference_loss:.6g}, "
        f"loss reduction {rel(interval.difference):+.2%} ({pct:.0f}% interval {rel(interval.low):+.2%} to "
        f"{rel(interval.high):+.2%}); required: lower end above {margin:+.2%}"
    )
    return Check(
        "downstream", f"gain over {label}", passed, message,
        {"reference_loss": interval.reference_loss, "candidate_loss": interval.candidate_loss,
         "gain": interval.relative(interval.difference), "low": interval.relative(interval.low),
         "high": interval.relative(interval.high), "required": margin, "rows": interval.n},
    )


# --- vector sanity ----------------------------------------------------------------------------------------------


def sanity_checks(vector_set: VectorSet, columns: list[str], policy: PromotionSpec) -> list[Check]:
    """Finite values, norms of the known categories within bounds, and no column collapsed to one point."""
    checks = []
    for col in columns:
        name = f"{col}: vectors sound"
        if col not in vector_set.vectors:
            checks.append(Check("sanity", name, False, f"the version has no vectors for embedded column {col!r}"))
            continue
        matrix = np.asarray(vector_set.vectors[col], dtype=np.float64)
        known = matrix[1:]
        bad = int((~np.isfinite(matrix)).any(axis=1).sum())
        if bad:
            checks.append(Check("sanity", name, False, f"{bad} vector row(s) hold NaN or infinity",
                                {"non_finite_rows": bad}))
            continue
        norms = np.linalg.norm(known, axis=1)
        too_small = int((norms < policy.min_norm).sum())
        too_large = int((norms > policy.max_norm).sum())
        figures: dict[str, Any] = {
            "categories": len(known), "dimension": matrix.shape[1],
            "norm_min": float(norms.min(initial=np.inf)) if len(norms) else float("nan"),
            "norm_median": float(np.median(norms)) if len(norms) else float("nan"),
            "norm_max": float(norms.max(initial=-np.inf)) if len(norms) else float("nan"),
        }
        problems = []
        if too_small or too_large:
            problems.append(
                f"{too_small + too_large} categor{'y' if too_small + too_large == 1 else 'ies'} with a norm outside "
                f"[{policy.min_norm:g}, {policy.max_norm:g}] (norms {figures['norm_min']:.4g} to "
                f"{figures['norm_max']:.4g})"
            )
        if len(known) >= 2:
            spread = float(np.linalg.norm(known - known.mean(axis=0), axis=1).max())
            mean_norm = float(norms.mean())
            figures["relative_spread"] = spread / mean_norm if mean_norm > 0 else 0.0
            if spread == 0 or spread <= policy.collapse_tolerance * mean_norm:
                problems.append(
                    f"collapsed: all {len(known)} categories lie within {spread:.3g} of their centroid "
                    f"(mean norm {mean_norm:.3g}, tolerance {policy.collapse_tolerance:g} of it)"
                )
        message = "; ".join(problems) or (
            f"finite; norms {figures['norm_min']:.4g} to {figures['norm_max']:.4g}; not collapsed"
        )
        checks.append(Check("sanity", name, not problems, message, figures))
    return checks


# --- stability against production -------------------------------------------------------------------------------


def stability_checks(
    production: VectorSet, candidate: VectorSet, columns: list[str], policy: PromotionSpec
) -> tuple[list[Check], dict[str, ColumnComparison]]:
    """Per column: aligned drift, neighbour overlap, shares of added and dropped categories, top movers."""
    comparisons = compare_vector_sets(production, candidate, neighbours=policy.neighbours)
    checks = []
    for col in columns:
        if col not in candidate.vectors:
            continue  # reported by the sanity check
        if col not in comparisons:
            checks.append(Check("stability", f"{col}: compared with production", None,
                                "production has no vectors for this column; nothing to compare"))
            continue
        comp = comparisons[col]
        top = comp.movers.head(policy.top_movers)
        movers = ", ".join(f"{c} {d:.2f}" for c, d in zip(top["category"], top["drift"], strict=True) if np.isfinite(d))
        checks.append(_threshold(
            f"{col}: drift", comp.drift, policy.max_drift, "at most",
            f"aligned drift on {len(comp.shared)} shared categories {comp.drift:.3f}"
            + (f"; top movers: {movers}" if movers else ""),
            {"drift": comp.drift, "shared": len(comp.shared), "top_movers": movers},
        ))
        checks.append(_threshold(
            f"{col}: neighbour overlap", comp.neighbour_overlap, policy.min_neighbour_overlap, "at least",
            f"{comp.neighbours} nearest neighbours overlap {comp.neighbour_overlap:.3f} "
            f"(unrelated vectors: {comp.chance_overlap:.3f})",
            {"overlap": comp.neighbour_overlap, "k": comp.neighbours, "chance": comp.chance_overlap},
        ))
        checks.append(_threshold(
            f"{col}: dropped categories", comp.dropped_share, policy.max_dropped_share, "at most",
            f"{len(comp.dropped)} of {comp.categories_older} production categories dropped ({comp.dropped_share:.1%})"
            + (f": {', '.join(comp.dropped[:10])}" if comp.dropped else ""),
            {"dropped": len(comp.dropped), "share": comp.dropped_share},
        ))
        checks.append(_threshold(
            f"{col}: added categories", comp.added_share, policy.max_added_share, "at most",
            f"{len(comp.added)} of {comp.categories_newer} candidate categories are new ({comp.added_share:.1%})",
            {"added": len(comp.added), "share": comp.added_share},
        ))
    return checks, comparisons


def _threshold(name: str, value: float, limit: float | None, how: str, message: str, figures: dict) -> Check:
    if limit is None:
        return Check("stability", name, None, message + " (not judged: no threshold)", figures)
    if not np.isfinite(value):
        return Check("stability", name, None, message + " (not measurable: too few shared categories)", figures)
    passed = value <= limit if how == "at most" else value >= limit
    return Check("stability", name, bool(passed), f"{message}; required {how} {limit:g}", {**figures, "limit": limit})


# --- expectations -----------------------------------------------------------------------------------------------


def spearman(x: np.ndarray, y: np.ndarray) -> float:
    """Spearman rank correlation: Pearson correlation of average ranks (ties share their mean rank)."""
    rx = pd.Series(np.asarray(x, dtype=np.float64)).rank(method="average").to_numpy()
    ry = pd.Series(np.asarray(y, dtype=np.float64)).rank(method="average").to_numpy()
    rx, ry = rx - rx.mean(), ry - ry.mean()
    denom = math.sqrt(float(rx @ rx) * float(ry @ ry))
    return float(rx @ ry / denom) if denom > 0 else float("nan")


def order_projection(points: np.ndarray, axis: str) -> np.ndarray:
    """Positions of the listed categories along the expectation's axis (see ``OrderExpectation``)."""
    x = np.asarray(points, dtype=np.float64)
    if axis == "principal":
        centred = x - x.mean(axis=0)
        _, _, vt = np.linalg.svd(centred, full_matrices=False)
        return centred @ vt[0]
    direction = x[-1] - x[0]
    length = float(np.linalg.norm(direction))
    if length == 0:
        return np.zeros(len(x))
    return (x - x[0]) @ (direction / length)


def _rows_of(vector_set: VectorSet, column: str, categories: list[str]) -> tuple[np.ndarray | None, list[str]]:
    vocab = vector_set.vocabularies[column]
    ids = vocab.encode(pd.Series(categories, dtype="string"))
    missing = [c for c, i in zip(categories, ids, strict=True) if i == 0]
    return (None if missing else vector_set.vectors[column][ids]), missing


def expectation_check(vector_set: VectorSet, expectation: OrderExpectation | NearerExpectation) -> Check:
    """One expectation, checked on one version's vectors."""
    col = expectation.column
    note = f" ({expectation.note})" if expectation.note else ""
    if isinstance(expectation, OrderExpectation):
        name = f"{col}: order {' < '.join(expectation.categories)}"
    else:
        name = (f"{col}: {expectation.nearer[0]}–{expectation.nearer[1]} nearer than "
                f"{expectation.than[0]}–{expectation.than[1]}")
    if col not in vector_set.vectors:
        return Check("expectation", name, False, f"the version has no vectors for column {col!r}")
    listed = list(expectation.categories) if isinstance(expectation, OrderExpectation) else [
        *expectation.nearer, *expectation.than]
    rows, missing = _rows_of(vector_set, col, listed)
    if rows is None:
        plural = "y" if len(missing) == 1 else "ies"
        return Check("expectation", name, False,
                     f"categor{plural} not in the vocabulary of {col!r}: {', '.join(missing)}")
    if isinstance(expectation, OrderExpectation):
        positions = order_projection(rows, expectation.axis)
        rho = spearman(np.arange(len(listed)), positions)
        judged = abs(rho) if expectation.axis == "principal" else rho
        passed = bool(np.isfinite(judged) and judged >= expectation.min_rank_correlation)
        kind = "|Spearman rho|" if expectation.axis == "principal" else "Spearman rho"
        along = "first principal component" if expectation.axis == "principal" else "line from first to last"
        flip = -1.0 if expectation.axis == "principal" and rho < 0 else 1.0
        found = [listed[i] for i in np.argsort(flip * positions, kind="stable")]
        return Check(
            "expectation", name, passed,
            f"{kind} {judged:.3f} along the {along} (required at least {expectation.min_rank_correlation:g}); "
            f"order found: {' < '.join(found)}{note}",
            {"rank_correlation": judged, "required": expectation.min_rank_correlation, "axis": expectation.axis,
             "positions": [float(p) for p in positions]},
        )
    a, b, c, d = rows
    near, far = _distance(a, b, expectation.metric), _distance(c, d, expectation.metric)
    passed = bool(near < far)
    return Check(
        "expectation", name, passed,
        f"{expectation.metric} distance {near:.4g} vs {far:.4g} ({'nearer' if passed else 'not nearer'}){note}",
        {"nearer_distance": near, "than_distance": far, "metric": expectation.metric},
    )


def _distance(u: np.ndarray, v: np.ndarray, metric: str) -> float:
    u, v = np.asarray(u, dtype=np.float64), np.asarray(v, dtype=np.float64)
    if metric == "cosine":
        denom = float(np.linalg.norm(u) * np.linalg.norm(v))
        return 1.0 - float(u @ v) / denom if denom > 0 else float("nan")
    return float(np.linalg.norm(u - v))


def expectation_checks(vector_set: VectorSet, policy: PromotionSpec) -> list[Check]:
    return [expectation_check(vector_set, e) for e in policy.expectations]


# --- which rows, which data -------------------------------------------------------------------------------------


def id_strings(values: pd.Series) -> pd.Series:
    """Ids spelled one way for comparing across files and versions (the same spelling as categories)."""
    return category_strings(values)


def write_train_ids(train_rows: pd.DataFrame, spec: Spec, folder: str | Path) -> Path:
    """Record the ids of the rows a version trained on (``folder`` is the run bundle's ``data/`` folder)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / Path(TRAIN_IDS_ARTIFACT).name
    pd.DataFrame({"id": id_strings(train_rows[spec.id_column])}).to_parquet(path, index=False)
    return path


def run_file(run_id: str, artifact: str) -> Path | None:
    """A file of a run's artifacts, downloaded once into the project's cache (run artifacts do not change)."""
    key = "".join(ch if ch.isalnum() else "_" for ch in tracking_uri())[-80:]
    target = project_home() / "cache" / key / "runs" / run_id
    local = target / artifact
    if local.exists():
        return local
    target.mkdir(parents=True, exist_ok=True)
    try:
        return Path(mlflow.artifacts.download_artifacts(
            run_id=run_id, artifact_path=artifact, dst_path=str(target), tracking_uri=tracking_uri()))
    except (MlflowException, OSError):
        return None


def trained_ids(version: registry.LoadedVersion) -> pd.Index | None:
    """Ids of the rows the version trained on, when its run recorded them."""
    path = run_file(version.run_id, TRAIN_IDS_ARTIFACT)
    if path is None or not path.exists():
        return None
    return pd.Index(pd.read_parquet(path)["id"].astype("string").dropna().unique())


def version_spec(version: registry.LoadedVersion) -> Spec | None:
    """The spec (as resolved) a version was trained with, from its run."""
    path = run_file(version.run_id, "spec.resolved.yaml")
    if path is None or not path.exists():
        return None
    try:
        return spec_from_dict(yaml.safe_load(path.read_text(encoding="utf-8")), str(path))
    except SpecError:
        return None  # written by an older spec model; treated as unknown


def spec_for(
    name: str, candidate: registry.LoadedVersion, spec_path: str | None, source: str | None = None
) -> tuple[Spec, str]:
    """The spec to read the newest data with: ``spec_path``, else the one the candidate was trained from.

    The data location is ``source`` when given; else, when the spec is the candidate's own and its train run read
    a drop named apart from the spec (``train --source``), that drop; else the spec's own ``source``.
    """
    recorded_source = None
    if spec_path is None:
        c = registry.client()
        version_tags = c.get_model_version(name, candidate.version).tags
        recorded = version_tags.get(SPEC_PATH_TAG) or c.get_run(candidate.run_id).data.tags.get(SPEC_PATH_TAG)
        recorded_source = version_tags.get(SOURCE_TAG)
        if not recorded or not Path(recorded).exists():
            where = f" (recorded: {recorded}, not found)" if recorded else ""
            raise SpecError(
                f"no spec file for {name!r} version {candidate.version}{where}; pass --spec PATH to name the "
                "dataset spec whose data the gate should judge on"
            )
        spec_path = recorded
    spec = load_spec(spec_path)
    if spec.name != name:
        raise SpecError(f"spec file {spec_path} describes model {spec.name!r}, not {name!r}")
    if source or recorded_source:
        spec = spec.with_source(source or recorded_source)
    return spec, str(spec_path)


@dataclass
class JudgedRows:
    frame: pd.DataFrame
    held_out: int
    notes: dict[str, str]
    checks: list[Check]


def unseen_rows(
    test_rows: pd.DataFrame,
    spec: Spec,
    versions: dict[str, registry.LoadedVersion],
    data_fingerprint: str,
) -> JudgedRows:
    """The held-out rows no judged version trained on, and how that was established for each version."""
    ids = id_strings(test_rows[spec.id_column])
    keep = np.ones(len(test_rows), dtype=bool)
    notes, checks = {}, []
    policy = spec.promotion
    for label, version in versions.items():
        seen = trained_ids(version)
        if seen is not None:
            overlap = ids.isin(seen).to_numpy()
            keep &= ~overlap
            notes[label] = f"version {version.version}: {int(overlap.sum())} held-out row(s) it trained on left out"
            checks.append(Check("rows", f"rows unseen by {label}", True, notes[label],
                                {"excluded": int(overlap.sum()), "method": "training ids"}))
            continue
        earlier = version_spec(version)
        fingerprint = registry.client().get_model_version(version.name, version.version).tags.get(
            f"{registry.TAG_PREFIX}data_fingerprint", version.vector_set.metadata.get("data_fingerprint", ""))
        same = (fingerprint == data_fingerprint and earlier is not None
                and earlier.split == spec.split and earlier.rules == spec.rules)
        if same:
            notes[label] = (f"version {version.version}: trained on this very data with the same rules and split, so "
                            "these held-out rows are its own held-out rows")
            checks.append(Check("rows", f"rows unseen by {label}", True, notes[label], {"method": "same data"}))
        else:
            notes[label] = (f"version {version.version}: its training rows were not recorded and it was trained on "
                            "other data or another split, so it may have trained on some of these rows")
            checks.append(Check("rows", f"rows unseen by {label}", False if policy.require_unseen_rows else None,
                                notes[label] + ("" if policy.require_unseen_rows
                                                else " (promotion.require_unseen_rows is off)"),
                                {"method": "unverified"}))
    frame = test_rows[keep].reset_index(drop=True)
    if policy.max_eval_rows is not None and len(frame) > policy.max_eval_rows:
        frame = frame.iloc[capped_rows(len(frame), policy.max_eval_rows, policy.seed)].reset_index(drop=True)
    enough = len(frame) >= policy.min_eval_rows
    checks.append(Check("rows", "enough judged rows", enough,
                        f"{len(frame)} held-out row(s) judged of {len(test_rows)} (required at least "
                        f"{policy.min_eval_rows})", {"rows": len(frame), "held_out": len(test_rows)}))
    return JudgedRows(frame, len(test_rows), notes, checks)


# --- downstream -------------------------------------------------------------------------------------------------


@dataclass
class Downstream:
    """Predictions and per-row losses of the judge model with each feature set, on the judged rows."""

    y: np.ndarray
    predictions: dict[str, np.ndarray]
    losses: dict[str, np.ndarray]
    table: pd.DataFrame
    how: str


def vector_block(vector_set: VectorSet, frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """The vectors of a frame's categories for the columns the vector set holds, side by side."""
    blocks = [vector_set.lookup(c, frame[c]) for c in columns if c in vector_set.vectors]
    return np.hstack(blocks) if blocks else np.zeros((len(frame), 0))


def judge_downstream(
    spec: Spec, fit_rows: pd.DataFrame, rows: pd.DataFrame, vector_sets: dict[str, VectorSet]
) -> Downstream:
    """Fit the judge model with the baseline features and with each version's vectors; predict ``rows``."""
    policy, task_kind = spec.promotion, spec.target.task
    transform = spec.target.transform if task_kind == "regression" else "none"
    y = target_values(rows, spec, "judged")
    labels = [BASELINE, *vector_sets, *(ENCODINGS if policy.compare_encodings else ())]
    predictions = {label: np.full(len(rows), np.nan) for label in labels}

    def fit_predict(train: pd.DataFrame, test: pd.DataFrame, into: np.ndarray | slice) -> None:
        y_train = target_values(train, spec, "fitting")
        y_fit = targets.forward(y_train, transform) if task_kind == "regression" else y_train
        blocks = {label: (vector_block(vs, train, spec.embed_names), vector_block(vs, test, spec.embed_names))
                  for label, vs in vector_sets.items()}
        sets = feature_sets(train, test, spec, y_fit, blocks)  # the same features the train run's evidence uses
        with _threads_for(len(train)):
            for label in labels:
                X_train, X_test = sets[label]
                model = downstream_model(policy.judge_model, task_kind, policy.seed)
                model.fit(X_train, y_fit)
                predictions[label][into] = predict_downstream(model, X_test, task_kind, transform)

    if policy.downstream_fit == "training_rows":
        keep = capped_rows(len(fit_rows), spec.evaluation.max_train_rows, spec.evaluation.seed)
        fit_predict(fit_rows.iloc[keep].reset_index(drop=True), rows, slice(None))
        how = (f"{policy.judge_model} fitted on {len(keep):,} rows of the newest training split, scored on "
               f"{len(rows):,} held-out rows")
    else:
        splitter = fold_splitter(task_kind, policy.folds, policy.seed)
        for train_idx, held_idx in splitter.split(np.zeros((len(rows), 1)), y):
            fit_predict(rows.iloc[train_idx].reset_index(drop=True), rows.iloc[held_idx].reset_index(drop=True),
                        held_idx)
        how = (f"{policy.judge_model} cross-fitted on the {len(rows):,} judged rows ({policy.folds} folds): each "
               "row is predicted by a model fitted on the other folds")
    losses = {label: per_row_loss(task_kind, y, p) for label, p in predictions.items()}
    table = pd.DataFrame([
        {"features": label, "model": policy.judge_model, **task_metrics(task_kind, y, predictions[label]),
         "mean_loss": float(losses[label].mean()), "rows": len(rows)}
        for label in labels
    ])
    return Downstream(y, predictions, losses, table, how)


@contextlib.contextmanager
def _threads_for(rows: int) -> Iterator[None]:
    """One OpenMP thread for small fits: below some tens of thousands of rows the threads' start-up and
    synchronisation cost more than they save, badly so on a busy machine (common practice, no source)."""
    if rows >= _SMALL_FIT_ROWS:
        yield
        return
    with threadpool_limits(limits=1, user_api="openmp"):
        yield


def network_predictions(version: registry.LoadedVersion, rows: pd.DataFrame) -> np.ndarray | None:
    """The version's own network on ``rows`` (original target scale), or None when its weights are not stored."""
    try:
        from entivec.tasks.train import FeatureEncoder, load_weights, predict
    except ImportError:
        return None
    encoder_file = run_file(version.run_id, "network/encoder.json")
    weights_file = run_file(version.run_id, "network/weights.safetensors")
    if encoder_file is None or weights_file is None:
        return None
    encoder = FeatureEncoder.from_dict(json.loads(encoder_file.read_text(encoding="utf-8")),
                                       version.vector_set.vocabularies)
    target = version.vector_set.metadata.get("target") or {}
    task_kind = target.get("task", "regression")
    pred = predict(load_weights(weights_file), encoder.transform(rows), task_kind)
    if task_kind == "regression":
        pred = targets.inverse(pred, target.get("transform", "none"))
    return np.asarray(pred, dtype=np.float64).reshape(-1)


# --- the verdict ------------------------------------------------------------------------------------------------


@dataclass
class GateResult:
    name: str
    candidate_version: str
    production_version: str | None
    passed: bool
    checks: list[Check]
    intervals: dict[str, PairedInterval]
    downstream: pd.DataFrame
    comparisons: dict[str, ColumnComparison]
    production_expectations: list[Check]
    rows: int
    rows_note: str
    how: str
    primary_metric: str
    data_fingerprint: str
    policy: dict[str, Any]

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.passed is False]

    def failed_lines(self) -> list[str]:
        return [f"{c.name}: {c.message}" for c in self.failed]

    def headline(self) -> dict[str, str]:
        """The few figures an audit entry carries."""
        out = {"rows": str(self.rows), "judged_data": self.data_fingerprint[:12]}
        for key, interval in self.intervals.items():
            out[f"gain_vs_{key}"] = interval.gain_text()
        drifts = [f"{col} {comp.drift:.2f}" for col, comp in self.comparisons.items() if np.isfinite(comp.drift)]
        if drifts:
            out["drift"] = ", ".join(drifts)
        out["checks"] = f"{sum(c.passed is True for c in self.checks)} passed, {len(self.failed)} failed"
        return out

    def checks_frame(self) -> pd.DataFrame:
        return pd.DataFrame([{"group": c.group, "check": c.name, "verdict": _verdict_word(c.passed),
                              "figures": c.message} for c in self.checks])

    def to_dict(self) -> dict[str, Any]:
        return _json({
            "name": self.name, "candidate_version": self.candidate_version,
            "production_version": self.production_version, "passed": self.passed,
            "rows": self.rows, "rows_note": self.rows_note, "how": self.how, "primary_metric": self.primary_metric,
            "data_fingerprint": self.data_fingerprint, "policy": self.policy,
            "checks": [c.to_dict() for c in self.checks],
            "intervals": {k: v.to_dict() for k, v in self.intervals.items()},
            "downstream": self.downstream.to_dict("records"),
            "comparisons": {k: v.summary(top=int(self.policy.get("top_movers", 10)))
                            for k, v in self.comparisons.items()},
            "production_expectations": [c.to_dict() for c in self.production_expectations],
        })

    def summary(self) -> str:
        against = f"production (version {self.production_version})" if self.production_version else "no production"
        lines = [
            f"Gate for {self.name} version {self.candidate_version} against {against} and the no-category baseline: "
            f"{'PASSED' if self.passed else 'FAILED'}.",
            f"Rows: {self.rows_note}",
            f"Judge: {self.how}.",
        ]
        lines += [f"- [{_verdict_word(c.passed)}] {c.name}: {c.message}" for c in self.checks]
        return "\n".join(lines)


def _verdict_word(passed: bool | None) -> str:
    return {True: "pass", False: "FAIL", None: "info"}[passed]


def run_gate(
    *,
    spec: Spec,
    candidate: registry.LoadedVersion,
    production: registry.LoadedVersion | None,
    train_rows: pd.DataFrame,
    test_rows: pd.DataFrame,
    data_fingerprint: str,
) -> GateResult:
    """Judge ``candidate`` against the baseline and ``production`` (when there is one) by ``spec.promotion``."""
    policy = spec.promotion
    versions = {CANDIDATE: candidate, **({PRODUCTION: production} if production else {})}
    judged = unseen_rows(test_rows, spec, versions, data_fingerprint)
    checks = list(judged.checks)
    intervals: dict[str, PairedInterval] = {}
    table = pd.DataFrame()
    how = "not judged"
    enough = judged.checks[-1].passed
    if enough:
        downstream = judge_downstream(spec, train_rows, judged.frame, {k: v.vector_set for k, v in versions.items()})
        table, how = downstream.table, downstream.how
        comparisons_to_make = [(BASELINE, policy.min_gain_over_baseline, "the no-category baseline")]
        if production:
            comparisons_to_make.append((PRODUCTION, policy.min_gain_over_production, f"production (version "
                                                                                      f"{production.version})"))
        for key, margin, label in comparisons_to_make:
            interval = paired_bootstrap(
                downstream.losses[key], downstream.losses[CANDIDATE], confidence=policy.confidence,
                resamples=policy.bootstrap_resamples, seed=policy.seed, reference=key, candidate=CANDIDATE,
            )
            intervals[key] = interval
            checks.append(gain_check(interval, margin, label))
        checks += _encoding_checks(downstream, policy)
        checks += _network_checks(spec, versions, judged.frame, downstream.y, policy)
    else:
        checks.append(Check("downstream", "downstream evidence", False,
                            "too few judged rows to measure the downstream gain"))
    checks += sanity_checks(candidate.vector_set, spec.embed_names, policy)
    comparisons: dict[str, ColumnComparison] = {}
    if production:
        stability, comparisons = stability_checks(production.vector_set, candidate.vector_set, spec.embed_names,
                                                  policy)
        checks += stability
    checks += expectation_checks(candidate.vector_set, policy)
    for_production = expectation_checks(production.vector_set, policy) if production else []
    passed = not any(c.passed is False for c in checks)
    return GateResult(
        name=candidate.name, candidate_version=str(candidate.version),
        production_version=str(production.version) if production else None, passed=passed, checks=checks,
        intervals=intervals, downstream=table, comparisons=comparisons, production_expectations=for_production,
        rows=len(judged.frame), rows_note=f"{len(judged.frame):,} of {judged.held_out:,} held-out rows of the newest "
        f"data; " + "; ".join(judged.notes.values()),
        how=how, primary_metric=PRIMARY[spec.target.task], data_fingerprint=data_fingerprint,
        policy=policy.model_dump(mode="json"),
    )


def _encoding_checks(downstream: Downstream, policy: PromotionSpec) -> list[Check]:
    """The candidate against one-hot and target encoding of the same columns: context, not a verdict."""
    out = []
    for name in ENCODINGS:
        if name not in downstream.losses:
            continue
        interval = paired_bootstrap(downstream.losses[name], downstream.losses[CANDIDATE],
                                    confidence=policy.confidence, resamples=policy.bootstrap_resamples,
                                    seed=policy.seed)
        out.append(Check("context", f"candidate vs {name.replace('_', ' ')}", None,
                         f"loss reduction {interval.gain_text()} against the embedded columns as {name} "
                         "(same judge model and rows; reported, not judged)",
                         {"gain": interval.relative(interval.difference), "low": interval.relative(interval.low),
                          "high": interval.relative(interval.high)}))
    return out


def _network_checks(
    spec: Spec, versions: dict, rows: pd.DataFrame, y: np.ndarray, policy: PromotionSpec
) -> list[Check]:
    """Each version's own network on the judged rows: figures for context, never deciding."""
    preds = {}
    for label, version in versions.items():
        try:
            pred = network_predictions(version, rows)
        except Exception as exc:  # noqa: BLE001 - context only: a network that cannot be loaded is reported
            return [Check("network", "networks on the judged rows", None, f"could not be evaluated: {exc}")]
        if pred is None:
            return [Check("network", "networks on the judged rows", None,
                          f"version {version.version} has no stored network; not evaluated")]
        preds[label] = pred
    task_kind = spec.target.task
    figures = {label: task_metrics(task_kind, y, p)[PRIMARY[task_kind]] for label, p in preds.items()}
    message = ", ".join(f"{label} network {PRIMARY[task_kind]} {v:.6g}" for label, v in figures.items())
    if PRODUCTION in preds:
        interval = paired_bootstrap(per_row_loss(task_kind, y, preds[PRODUCTION]),
                                    per_row_loss(task_kind, y, preds[CANDIDATE]), confidence=policy.confidence,
                                    resamples=policy.bootstrap_resamples, seed=policy.seed)
        message += f"; candidate vs production gain {interval.gain_text()}"
    return [Check("network", "networks on the judged rows", None, message, figures)]


# --- applying the verdict ---------------------------------------------------------------------------------------


def apply_verdict(
    result: GateResult, *, by: str, reason: str, forced: bool, evidence_run: str, candidate_fingerprint: str
) -> audit.AuditEntry:
    """Move production (a pass, or a forced failure) or record the refusal, under the model's lifecycle lock.

    The move is made only if production is still the version the gate judged against (compare-and-check):
    a promotion applied meanwhile by someone else raises ``audit.ConcurrentChange`` and changes nothing.
    """
    details = {
        "figures": result.headline(),
        "failed_checks": [c.name for c in result.failed],
        "evidence_run": evidence_run,
        "gate_data_fingerprint": result.data_fingerprint,
    }
    verdict = "pass" if result.passed else ("forced" if forced else "fail")
    with audit.locked(result.name) as session:
        if result.passed or forced:
            entry = session.move(
                registry.PRODUCTION, result.candidate_version, event="forced_promote" if forced else "promote",
                by=by, reason=reason, verdict=verdict, data_fingerprint=candidate_fingerprint, details=details,
                expected_from=result.production_version,
            )
        else:
            entry = session.record(
                event="refused", alias=registry.PRODUCTION, from_version=result.production_version,
                to_version=result.candidate_version, by=by, reason=reason, verdict=verdict,
                data_fingerprint=candidate_fingerprint, details=details,
            )
    c = registry.client()
    for key, value in (("verdict", verdict), ("evidence_run", evidence_run), ("at", entry.at)):
        c.set_model_version_tag(result.name, result.candidate_version, f"{registry.TAG_PREFIX}gate.{key}", value)
    return entry


@task(name="apply-verdict", cache_policy=NO_CACHE)
def apply_verdict_task(result: GateResult, **kwargs) -> audit.AuditEntry:
    return apply_verdict(result, **kwargs)


@task(name="judge-candidate", cache_policy=NO_CACHE)
def run_gate_task(**kwargs) -> GateResult:
    return run_gate(**kwargs)
