"""Orthogonal Procrustes alignment: two trainings of one network put their vectors in rotated coordinates.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import orthogonal_procrustes


def align_to(source: np.ndarray, reference: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
    """Rotate and translate ``source`` onto ``reference`` by orthogonal Procrustes, fitted on ``rows``.

    Both matrices have one row per vocabulary id and the same shape. With A and B the chosen rows of each,
    centred on their own means, the rotation R is the orthogonal matrix minimising ||A R - B||_F, which is
    U Vᵀ for the singular value decomposition A ᵀB = U S Vᵀ (Schönemann, "A generalized solution of the
    orthogonal Procrustes problem", Psychometrika 1966), computed by ``scipy.linalg.orthogonal_procrustes``.
    The whole of ``source`` is then moved:
    (source - mean_A) R + mean_B. R may include a reflection; no scaling is applied.

    ``rows`` are vocabulary ids (integers) or a boolean mask; the default is every row but 0, the unknown row,
    whose vector stands for whatever was rare or missing and is no fixed point to align on.
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
    mean_a, mean_b = a.mean(axis=0), b.mean(axis=0)
    rotation, _ = orthogonal_procrustes(a - mean_a, b - mean_b)
    return (src - mean_a) @ rotation + mean_b
