"""Comparing two vector sets column by column: vocabulary changes, aligned drift, neighbour overlap, top movers.

Two trainings of the same network put their vectors in different, arbitrarily rotated coordinates, so raw
coordinates are never compared. Per embedded column, on the categories both versions know (matched by
their spelling, never by id; the unknown row 0 is left out, it stands for whatever was rare or missing):

- **drift**: the newer vectors are rotated and translated onto the older ones by orthogonal Procrustes
  (``align_to``, shared with the downstream evaluation); the drift of a category is the distance between
  its aligned new vector and its old vector, divided by the old vectors' root-mean-square distance from
  their centroid. A column's drift is the root mean square of its categories' drifts, i.e. the Procrustes
  residual ``||A R - B||_F / ||B - mean(B)||_F``: 0 is the same geometry, about 1 is no better than putting
  every category at the centroid. No scaling is fitted, so a change of scale counts as drift (it changes
  what downstream models see). When the two versions have different vector lengths, the shorter is padded
  with zero columns, the usual way to compare configurations of unequal dimension.
- **neighbour overlap**: for each shared category, the share of its k nearest neighbours (Euclidean, among
  the shared categories, each version in its own coordinates: distances need no alignment) that are the
  same in both versions; k is at most half of the other shared categories so that the figure can tell
  related from unrelated vectors. ``chance_overlap`` = k / (n - 1) is what unrelated vectors give on average.
- **added / dropped**: categories only in the newer / only in the older vocabulary, as shares of the
  newer / older vocabulary.
- **movement beyond noise**: where both versions carry per-category confidence (``VectorSet.confidence``: the
  root mean squared spread of a category's aligned fold vectors), a category's own noise is
  ``sqrt(spread_older² + spread_newer²)``, the spread expected of the difference of two independent estimates,
  in the same relative units as its drift. A category moved *beyond noise* when its drift exceeds
  ``NOISE_FACTOR`` times that (two standard errors, common practice, no source); *within noise* otherwise;
  *not measured* without confidence on both sides. Categories with fewer than ``RARE_COUNT`` training rows in
  either version are *rare* and listed apart: their vectors move with every retrain.

``movers`` lists every shared category in this order: non-rare categories that moved beyond noise (largest
drift first), then the other non-rare ones, then the rare ones, each group by drift; ``rare`` and ``moved``
say which group a row is in, so the head of the table is what a reviewer should look at first.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.evidence.align import align_to

# Our defaults, no source: a category seen fewer times than this in either version is "rare"; movement beyond
# this many times a category's own noise counts as movement (about two standard errors).
RARE_COUNT = 30  # the same as the reports (tasks/present/maps.py: RARE_ROWS)
NOISE_FACTOR = 2.0
BEYOND, WITHIN, UNMEASURED = "beyond noise", "within noise", "not measured"


@dataclass
class ColumnComparison:
    """How one column's vectors changed from ``older`` to ``newer``."""

    column: str
    categories_older: int  # known categories, the unknown row not counted
    categories_newer: int
    dimension_older: int
    dimension_newer: int
    shared: list[str]
    added: list[str]
    dropped: list[str]
    drift: float  # NaN when fewer than 2 categories are shared
    neighbours: int  # k actually used (0 when not measurable)
    neighbour_overlap: float  # NaN when not measurable
    chance_overlap: float
    # category, drift, count_older, count_newer, noise, moved, rare: every shared category, ordered as the module
    # notes say (beyond noise first, rare last)
    movers: pd.DataFrame
    aligned_newer: np.ndarray = field(repr=False)  # shared rows of the newer vectors, aligned onto the older
    older_shared: np.ndarray = field(repr=False)  # shared rows of the older vectors (padded to one width)

    @property
    def added_share(self) -> float:
        return len(self.added) / self.categories_newer if self.categories_newer else 0.0

    @property
    def dropped_share(self) -> float:
        return len(self.dropped) / self.categories_older if self.categories_older else 0.0

    @property
    def moved_beyond_noise(self) -> int:
        """Non-rare shared categories that moved more than their own uncertainty."""
        return int(((self.movers["moved"] == BEYOND) & ~self.movers["rare"]).sum())

    @property
    def noise_measured(self) -> bool:
        return bool((self.movers["moved"] != UNMEASURED).any())

    def rare_movers(self) -> pd.DataFrame:
        return self.movers[self.movers["rare"]]

    def summary(self, top: int = 5) -> dict:
        """JSON-safe figures of the column (top movers cut to ``top``)."""
        def records(frame: pd.DataFrame) -> list[dict]:
            return [{k: (_num(v) if isinstance(v, float) else v) for k, v in row.items()}
                    for row in frame.head(top).to_dict("records")]

        return {
            "column": self.column,
            "categories_older": self.categories_older,
            "categories_newer": self.categories_newer,
            "dimension_older": self.dimension_older,
            "dimension_newer": self.dimension_newer,
            "shared": len(self.shared),
            "added": len(self.added),
            "dropped": len(self.dropped),
            "added_share": self.added_share,
            "dropped_share": self.dropped_share,
            "drift": _num(self.drift),
            "neighbours": self.neighbours,
            "neighbour_overlap": _num(self.neighbour_overlap),
            "chance_overlap": _num(self.chance_overlap),
            "noise_measured": self.noise_measured,
            "moved_beyond_noise": self.moved_beyond_noise,
            "top_movers": records(self.movers[~self.movers["rare"]]),
            "rare_movers": records(self.rare_movers()),
        }


def _num(value: float) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


def known_rows(vocabulary: Vocabulary) -> pd.Index:
    """The categories of a vocabulary without the unknown row, in id order (position i is id i + 1)."""
    return pd.Index(vocabulary.categories[1:], dtype="string")


def _pad(matrix: np.ndarray, width: int) -> np.ndarray:
    matrix = np.asarray(matrix, dtype=np.float64)
    if matrix.shape[1] == width:
        return matrix
    return np.hstack([matrix, np.zeros((matrix.shape[0], width - matrix.shape[1]))])


def procrustes_drift(newer: np.ndarray, older: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Align ``newer`` onto ``older`` (same rows, same width) and return (aligned, per-row drift, column drift).

    Per-row drift and column drift are relative to the older rows' root-mean-square distance from their
    centroid (see the module notes). With fewer than 2 rows, or older rows all equal, the figures are NaN.
    """
    newer = np.asarray(newer, dtype=np.float64)
    older = np.asarray(older, dtype=np.float64)
    n = older.shape[0]
    if n < 2:
        return newer.copy(), np.full(n, np.nan), float("nan")
    aligned = align_to(newer, older, rows=np.arange(n))
    spread = float(np.sqrt(np.mean(np.sum((older - older.mean(axis=0)) ** 2, axis=1))))
    if spread == 0:
        return aligned, np.full(n, np.nan), float("nan")
    per_row = np.linalg.norm(aligned - older, axis=1) / spread
    return aligned, per_row, float(np.sqrt(np.mean(per_row**2)))


def nearest_neighbours(points: np.ndarray, k: int) -> np.ndarray:
    """(n, k) indices of each point's k nearest other points by Euclidean distance, nearest first.

    scikit-learn's exact brute-force search (``NearestNeighbors(algorithm="brute")``, which works in chunks of
    bounded memory); asked without query points it leaves each point out of its own list.
    """
    from sklearn.neighbors import NearestNeighbors

    x = np.asarray(points, dtype=np.float64)
    n = x.shape[0]
    if not 1 <= k <= n - 1:
        raise ValueError(f"k must be between 1 and n - 1 = {n - 1}, got {k}")
    search = NearestNeighbors(n_neighbors=k, algorithm="brute", metric="euclidean", n_jobs=1).fit(x)
    return search.kneighbors(return_distance=False).astype(np.int64, copy=False)


def neighbour_overlap(older: np.ndarray, newer: np.ndarray, k: int) -> tuple[np.ndarray, int]:
    """Per row, the share of its k nearest neighbours that are the same in both matrices; and the k used.

    k is capped at half the other rows, (n - 1) // 2: with k close to n - 1 every neighbour list holds
    almost every row and the overlap is near 1 whatever the vectors (chance level k / (n - 1)). Returns
    (an empty array, 0) when fewer than 3 rows leave no room for k >= 1.
    """
    n = older.shape[0]
    k = min(k, (n - 1) // 2)
    if k < 1:
        return np.zeros(0), 0
    a = np.sort(nearest_neighbours(older, k), axis=1)
    b = np.sort(nearest_neighbours(newer, k), axis=1)
    same = (a[:, :, None] == b[:, None, :]).any(axis=2).sum(axis=1)
    return same / k, k


def compare_column(
    column: str,
    older_vocabulary: Vocabulary,
    older_vectors: np.ndarray,
    newer_vocabulary: Vocabulary,
    newer_vectors: np.ndarray,
    *,
    neighbours: int = 10,
    older_confidence: pd.DataFrame | None = None,
    newer_confidence: pd.DataFrame | None = None,
    rare_count: int = RARE_COUNT,
) -> ColumnComparison:
    """Compare one column of two vector sets (``older`` is the reference the newer is aligned onto).

    ``older_confidence`` / ``newer_confidence`` are the versions' confidence tables of the column (one row per
    vocabulary id, ``VectorSet.confidence``); without both, movement is "not measured" against noise.
    """
    old_index, new_index = known_rows(older_vocabulary), known_rows(newer_vocabulary)
    shared_mask = old_index.isin(new_index)
    shared = old_index[shared_mask]
    added = new_index[~new_index.isin(old_index)]
    dropped = old_index[~shared_mask]
    old_ids = np.flatnonzero(shared_mask) + 1
    new_ids = new_index.get_indexer(shared) + 1
    width = max(older_vectors.shape[1], newer_vectors.shape[1])
    older_shared = _pad(np.asarray(older_vectors)[old_ids], width)
    newer_shared = _pad(np.asarray(newer_vectors)[new_ids], width)

    aligned, per_row, drift = procrustes_drift(newer_shared, older_shared)
    overlap, k = neighbour_overlap(older_shared, newer_shared, neighbours)
    old_counts = np.asarray(older_vocabulary.counts)[old_ids]
    new_counts = np.asarray(newer_vocabulary.counts)[new_ids]
    noise = _noise(older_confidence, newer_confidence, old_ids, new_ids, older_shared)
    with np.errstate(invalid="ignore"):
        moved = np.where(~np.isfinite(noise), UNMEASURED, np.where(per_row > NOISE_FACTOR * noise, BEYOND, WITHIN))
    movers = pd.DataFrame(
        {
            "category": shared.astype(str).to_numpy(dtype=object),
            "drift": per_row,
            "count_older": old_counts.astype(np.int64),
            "count_newer": new_counts.astype(np.int64),
            "noise": noise,
            "moved": moved.astype(object),
            "rare": (np.minimum(old_counts, new_counts) < rare_count),
        }
    )
    group = np.where(movers["rare"], 2, np.where(movers["moved"] == BEYOND, 0, 1))
    movers = movers.assign(_group=group, _key=-movers["drift"].fillna(-np.inf))
    movers = movers.sort_values(["_group", "_key"], kind="stable").drop(columns=["_group", "_key"])
    movers = movers.reset_index(drop=True)
    n_shared = len(shared)
    return ColumnComparison(
        column=column,
        categories_older=len(old_index),
        categories_newer=len(new_index),
        dimension_older=int(older_vectors.shape[1]),
        dimension_newer=int(newer_vectors.shape[1]),
        shared=[str(c) for c in shared],
        added=[str(c) for c in added],
        dropped=[str(c) for c in dropped],
        drift=drift,
        neighbours=k,
        neighbour_overlap=float(overlap.mean()) if k else float("nan"),
        chance_overlap=k / (n_shared - 1) if k else float("nan"),
        movers=movers,
        aligned_newer=aligned,
        older_shared=older_shared,
    )


def _noise(older: pd.DataFrame | None, newer: pd.DataFrame | None, old_ids: np.ndarray, new_ids: np.ndarray,
           older_shared: np.ndarray) -> np.ndarray:
    """Per shared category, sqrt(spread_older² + spread_newer²) in drift units; NaN where not measured."""
    if older is None or newer is None or len(old_ids) < 2:
        return np.full(len(old_ids), np.nan)
    scale = float(np.sqrt(np.mean(np.sum((older_shared - older_shared.mean(axis=0)) ** 2, axis=1))))
    if scale == 0:
        return np.full(len(old_ids), np.nan)
    s_old = older["spread"].to_numpy(dtype=np.float64)[old_ids]
    s_new = newer["spread"].to_numpy(dtype=np.float64)[new_ids]
    return np.sqrt(s_old**2 + s_new**2) / scale


def compare_vector_sets(older: VectorSet, newer: VectorSet, *, neighbours: int = 10) -> dict[str, ColumnComparison]:
    """Every column both vector sets hold, compared (columns held by one only are left out; see ``columns_of``)."""
    return {
        col: compare_column(
            col,
            older.vocabularies[col],
            older.vectors[col],
            newer.vocabularies[col],
            newer.vectors[col],
            neighbours=neighbours,
            older_confidence=older.confidence.get(col),
            newer_confidence=newer.confidence.get(col),
        )
        for col in older.columns
        if col in newer.vectors
    }


def columns_of(older: VectorSet, newer: VectorSet) -> dict[str, list[str]]:
    """Columns in both, only in the older, only in the newer vector set."""
    return {
        "both": [c for c in older.columns if c in newer.vectors],
        "older_only": [c for c in older.columns if c not in newer.vectors],
        "newer_only": [c for c in newer.columns if c not in older.vectors],
    }


def comparison_table(comparisons: dict[str, ColumnComparison]) -> pd.DataFrame:
    """One row per column: the figures a reader scans first."""
    rows = []
    for comp in comparisons.values():
        top = comp.movers[~comp.movers["rare"]].head(3)
        rare = comp.rare_movers().head(3)
        rows.append(
            {
                "column": comp.column,
                "categories (older → newer)": f"{comp.categories_older} → {comp.categories_newer}",
                "added": len(comp.added),
                "dropped": len(comp.dropped),
                "dimension (older → newer)": f"{comp.dimension_older} → {comp.dimension_newer}",
                "drift": comp.drift,
                "neighbour overlap": comp.neighbour_overlap,
                "chance overlap": comp.chance_overlap,
                "moved beyond noise": comp.moved_beyond_noise if comp.noise_measured else None,
                "top movers": ", ".join(f"{c} ({d:.2f}, {m})" for c, d, m in zip(top["category"], top["drift"],
                                                                                  top["moved"], strict=True)
                                        if np.isfinite(d)),
                "rare movers": ", ".join(f"{c} ({d:.2f}, n={n})" for c, d, n in zip(
                    rare["category"], rare["drift"], rare["count_newer"], strict=True) if np.isfinite(d)),
            }
        )
    return pd.DataFrame(rows)
