"""The gate's statistics and checks on vectors: paired bootstrap, sanity, stability against production, expectations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from entivec.schemas.promotion import NearerExpectation, OrderExpectation, PromotionSpec
from entivec.schemas.vector_set import VectorSet
from entivec.tasks.lifecycle.compare import RARE_COUNT, WITHIN, ColumnComparison, compare_vector_sets

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
                "figures": {k: json_value(v) for k, v in self.figures.items()}}


def json_value(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (list, tuple)):
        return [json_value(v) for v in value]
    if isinstance(value, dict):
        return {str(k): json_value(v) for k, v in value.items()}
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
        return json_value({
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


def _mean_difference(reference: np.ndarray, candidate: np.ndarray, axis: int = -1) -> np.ndarray:
    return np.mean(reference - candidate, axis=axis)


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
    (1 - confidence)/2 and (1 + confidence)/2 quantiles (linear interpolation) of those means. Computed by
    ``scipy.stats.bootstrap`` (paired, percentile method, vectorised).
    """
    from scipy.stats import bootstrap

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
    result = bootstrap(
        (ref, cand), _mean_difference, paired=True, vectorized=True, n_resamples=resamples, batch=batch,
        confidence_level=confidence, method="percentile", rng=np.random.default_rng(seed),
    )
    means = result.bootstrap_distribution
    low, high = result.confidence_interval.low, result.confidence_interval.high
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
        # Movers: non-rare categories first, those that moved beyond their own noise leading (compare.py); rare
        # categories are named apart, since their vectors move with every retrain.
        top = comp.movers[~comp.movers["rare"]].head(policy.top_movers)
        movers = ", ".join(f"{c} {d:.2f}" + (" (within noise)" if m == WITHIN else "")
                           for c, d, m in zip(top["category"], top["drift"], top["moved"], strict=True)
                           if np.isfinite(d))
        rare = comp.rare_movers().head(5)
        rare_text = ", ".join(f"{c} {d:.2f} (n={n})" for c, d, n in zip(
            rare["category"], rare["drift"], rare["count_newer"], strict=True) if np.isfinite(d))
        noise = (f"; {comp.moved_beyond_noise} of {int((~comp.movers['rare']).sum())} non-rare categories moved "
                 "beyond their own uncertainty" if comp.noise_measured else "")
        checks.append(_threshold(
            f"{col}: drift", comp.drift, policy.max_drift, "at most",
            f"aligned drift on {len(comp.shared)} shared categories {comp.drift:.3f}{noise}"
            + (f"; top movers: {movers}" if movers else "")
            + (f"; rare categories (fewer than {RARE_COUNT} rows) apart: {rare_text}" if rare_text else ""),
            {"drift": comp.drift, "shared": len(comp.shared), "top_movers": movers,
             "moved_beyond_noise": comp.moved_beyond_noise if comp.noise_measured else None,
             "rare_movers": rare_text},
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
