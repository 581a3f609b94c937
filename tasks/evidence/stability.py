"""Seed stability: how much two networks trained on the same rows with different seeds disagree, per column.

A version-to-version change in the vectors is only news when it is larger than what a new seed alone does. Per
embedded column, on the known categories (at most ``MAX_CATEGORIES`` of them, the most frequent first):

- ``seed_neighbour_overlap``: the share of each category's k nearest neighbours (Euclidean, each network in its
  own coordinates) that both networks agree on, averaged; ``seed_chance_overlap`` = k / (n - 1) is what unrelated
  vectors would give;
- ``seed_aligned_distance``: the second network's vectors rotated onto the first by orthogonal Procrustes
  (``align_to``), then ``||A R - B||_F / ||B - mean(B)||_F``, the residual as a share of the first network's
  spread (0: the same geometry; about 1: no better than the centroid) — the same figure ``entivec diff`` calls
  drift, so the two can be read side by side.
"""

from __future__ import annotations

import numpy as np
from sklearn.neighbors import NearestNeighbors

from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.evidence.align import align_to

MAX_CATEGORIES = 5_000  # bounds the neighbour search: exact k-NN over 50,000 categories costs minutes
NEIGHBOURS = 10


def _overlap(a: np.ndarray, b: np.ndarray, k: int) -> float:
    near_a = NearestNeighbors(n_neighbors=k + 1).fit(a).kneighbors(a, return_distance=False)[:, 1:]
    near_b = NearestNeighbors(n_neighbors=k + 1).fit(b).kneighbors(b, return_distance=False)[:, 1:]
    same = (np.sort(near_a, axis=1)[:, :, None] == np.sort(near_b, axis=1)[:, None, :]).any(axis=2).sum(axis=1)
    return float(np.mean(same / k))


def column_stability(vocabulary: Vocabulary, first: np.ndarray, second: np.ndarray,
                     neighbours: int = NEIGHBOURS) -> dict[str, float]:
    """The figures of one column (see the module notes); NaN where fewer than 3 categories were trained."""
    counts = np.asarray(vocabulary.counts)
    known = np.flatnonzero(counts > 0)
    known = known[known > 0]
    known = known[np.argsort(-counts[known], kind="stable")][:MAX_CATEGORIES]
    n = len(known)
    k = min(neighbours, (n - 1) // 2)
    if k < 1:
        return {"seed_neighbour_overlap": float("nan"), "seed_chance_overlap": float("nan"),
                "seed_aligned_distance": float("nan"), "seed_categories": float(n)}
    a = np.asarray(first, dtype=np.float64)[known]
    b = np.asarray(second, dtype=np.float64)[known]
    aligned = align_to(b, a, rows=np.arange(n))
    spread = np.linalg.norm(a - a.mean(axis=0))
    return {
        "seed_neighbour_overlap": _overlap(a, b, k),
        "seed_chance_overlap": k / (n - 1),
        "seed_aligned_distance": float(np.linalg.norm(aligned - a) / spread) if spread > 0 else float("nan"),
        "seed_categories": float(n),
    }


def seed_stability(vocabularies: dict[str, Vocabulary], first: dict[str, np.ndarray],
                   second: dict[str, np.ndarray]) -> dict[str, dict[str, float]]:
    """Per column, ``column_stability`` of two networks' vectors (same vocabularies, same training rows)."""
    return {col: column_stability(vocabularies[col], first[col], second[col]) for col in first}
