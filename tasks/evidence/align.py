"""Orthogonal Procrustes alignment: two trainings of one network put their vectors in rotated coordinates.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import orthogonal_procrustes


def align_to(
    source: np.ndarray, reference: np.ndarray, rows: np.ndarray | None = None, weights: np.ndarray | None = None
) -> np.ndarray:
    """Rotate and translate ``source`` onto ``reference`` by orthogonal Procrustes, fitted on ``rows``.

    Both matrices have one row per vocabulary id and the same shape. With A and B the chosen rows of each,
    centred on their own means, the rotation R is the orthogonal matrix minimising ||A R - B||_F, which is
    U Vᵀ for the singular value decomposition A ᵀB = U S Vᵀ (Schönemann, "A generalized solution of the
    orthogonal Procrustes problem", Psychometrika 1966), computed by ``scipy.linalg.orthogonal_procrustes``.
    The whole of ``source`` is then moved:
    (source - mean_A) R + mean_B. R may include a reflection; no scaling is applied.

    ``rows`` are vocabulary ids (integers) or a boolean mask; the default is every row but 0, the unknown row,
    whose vector stands for whatever was rare or missing and is no fixed point to align on.

    ``weights`` (one per vocabulary row, non-negative) fit a weighted Procrustes instead: weighted means, and
    the SVD of Aᵀ W B, so that well-measured rows (weights = training counts) decide the rotation.
    """
    src = np.asarray(source, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    if src.ndim != 2 or ref.ndim != 2:
        raise ValueError("align_to needs two 2-d matrices (vocabulary rows x dimensions)")
    if src.shape != ref.shape:
        raise ValueError(f"cannot align a {src.shape} matrix onto a {ref.shape} matrix: shapes differ")
    if rows is None:
        picked = np.arange(1, src.shape[0])
    else:
        picked = np.asarray(rows)
        if picked.dtype == bool:
            if picked.shape != (src.shape[0],):
                raise ValueError("a boolean row mask must have one entry per vocabulary row")
            picked = np.flatnonzero(picked)
        picked = picked.astype(np.int64, copy=False)
    if picked.size == 0:
        raise ValueError("align_to needs at least one shared row to align on")
    a, b = src[picked], ref[picked]
    if weights is None:
        w = np.full(len(picked), 1.0 / len(picked))
    else:
        w = np.asarray(weights, dtype=np.float64)[picked]
        if (w < 0).any() or not np.isfinite(w).all() or w.sum() <= 0:
            raise ValueError("weights must be finite, non-negative and not all zero on the rows aligned on")
        w = w / w.sum()
    mean_a, mean_b = (a.mean(axis=0), b.mean(axis=0)) if weights is None else (w @ a, w @ b)
    # Weighted orthogonal Procrustes is the plain problem on rows scaled by the square roots of the weights. Equal
    # weights are left unscaled: with fewer rows than dimensions the rotation is not unique, and an unscaled
    # problem gives the same choice as the textbook computation the tests compare with.
    root = 1.0 if weights is None else np.sqrt(w)[:, None]
    rotation, _ = orthogonal_procrustes((a - mean_a) * root, (b - mean_b) * root)
    return (src - mean_a) @ rotation + mean_b
