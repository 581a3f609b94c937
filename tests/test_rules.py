"""Cleaning rules, validation reasons and the row ledger, on small hand-made tables (pure mechanics)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from entivec.schemas.ledger import Ledger, LedgerMismatch
from entivec.schemas.spec import SpecError, spec_from_dict
from entivec.tasks.ingest import clean as cleaning
from entivec.tasks.ingest.clean import validate_and_clean
from entivec.tasks.ingest.read import InputError


def make_spec(rules=(), *, numeric=None, target=None, onehot=None, split=None):
    raw = {
        "name": "unit",
        "source": {"path": "data.csv"},
        "id_column": "row_id",
        "target": target or {"column": "price", "task": "regression"},
        "columns": {
            "embed": ["depot"],
            "onehot": onehot if onehot is not None else [{"name": "region"}],
            "numeric": numeric
            if numeric is not None
            else [{"name": "review_count"}, {"name": "review_rate", "nullable": True}],
        },
        "rules": list(rules),
    }
    if split is not None:
        raw["split"] = split
    return spec_from_dict(raw)


def make_frame(**columns):
    n = len(next(iter(columns.values())))
    base = {
        "row_id": [f"r{i:03d}" for i in range(n)],
        "depot": ["d1", "d2"] * (n // 2) + ["d1"] * (n % 2),
        "region": ["north"] * n,
        "review_count": [1.0] * n,
        "review_rate": [4.0] * n,
        "price": [100.0] * n,
    }
    base.update(columns)
    return pd.DataFrame(base)


def reasons_by_id(result):
    q = result.quarantine
    return dict(zip(q["row_id"], q["_reasons"], strict=True))


def steps(result):
    return {(s.step, s.action): s.rows for s in result.ledger.steps}


def assert_adds_up(result, rows_in):
    ledger = result.ledger
    assert ledger.rows_in == rows_in
    assert len(result.frame) + len(result.quarantine) == rows_in
    assert ledger.rows_quarantined == len(result.quarantine)
    assert ledger.rows_used == len(result.frame)


# --- range ------------------------------------------------------------------------------------------------------

PRICES = [20.0, 21.0, 999.0, 1000.0, np.nan, 5.0, 2000.0]


def test_range_inclusive_keeps_both_bounds():
    spec = make_spec([{"kind": "range", "column": "price", "min": 20, "max": 1000}])
    result = validate_and_clean(make_frame(price=PRICES), spec)
    assert sorted(result.frame["price"]) == [20.0, 21.0, 999.0, 1000.0]
    assert steps(result)[("rules[0]:range:price", "quarantine")] == 3
    assert set(reasons_by_id(result).values()) == {"rules[0]:range:price"}
    assert_adds_up(result, len(PRICES))


def test_range_exclusive_drops_the_bounds():
    spec = make_spec([{"kind": "range", "column": "price", "min": 20, "max": 1000, "inclusive": False}])
    result = validate_and_clean(make_frame(price=PRICES), spec)
    assert sorted(result.frame["price"]) == [21.0, 999.0]
    assert steps(result)[("rules[0]:range:price", "quarantine")] == 5
    assert "20 < price < 1000" in result.ledger.steps[0].detail
    assert_adds_up(result, len(PRICES))


def test_range_with_one_bound():
    spec = make_spec([{"kind": "range", "column": "price", "min": 21}])
    assert sorted(validate_and_clean(make_frame(price=PRICES), spec).frame["price"]) == [21.0, 999.0, 1000.0, 2000.0]
    spec = make_spec([{"kind": "range", "column": "price", "max": 21, "inclusive": False}])
    assert sorted(validate_and_clean(make_frame(price=PRICES), spec).frame["price"]) == [5.0, 20.0]


def test_missing_value_fails_a_range_rule_under_the_rule_name():
    # The target may not be missing, but a range rule on it owns its missing values: they count under the rule.
    spec = make_spec([{"kind": "range", "column": "price", "min": 0}])
    result = validate_and_clean(make_frame(price=[1.0, np.nan, 3.0]), spec)
    assert reasons_by_id(result) == {"r001": "rules[0]:range:price"}
    assert "null:price" not in {s.step for s in result.ledger.steps}


def test_range_rule_on_a_text_column_is_a_spec_error():
    spec = make_spec([{"kind": "range", "column": "depot", "min": 0}])
    with pytest.raises(SpecError, match=r"rules\[0\].*'depot'"):
        validate_and_clean(make_frame(price=[1.0, 2.0]), spec)


# --- fill -------------------------------------------------------------------------------------------------------

COUNTS = [0.0, 0.0, 3.0, 5.0, 0.0, 2.0]
RATES = [np.nan, np.nan, np.nan, 4.5, 3.0, np.nan]
FILL = {"kind": "fill", "column": "review_rate", "value": 0, "when": {"column": "review_count", "equals": 0}}


def test_conditional_fill_fills_only_inside_the_condition_and_reports_the_rest():
    spec = make_spec([FILL])
    result = validate_and_clean(make_frame(review_count=COUNTS, review_rate=RATES), spec)
    s = steps(result)
    assert s[("rules[0]:fill:review_rate", "fill")] == 2  # r000, r001: no reviews, so a rate of 0
    assert s[("rules[0]:unfilled:review_rate", "report")] == 2  # r002, r005: reviews exist, rate unknown
    report = next(x for x in result.ledger.steps if x.action == "report")
    assert "<frame> row 3" in report.detail and "<frame> row 6" in report.detail
    # Left alone by the rule, the numeric feature is then not model-ready: quarantined, never silently kept.
    assert reasons_by_id(result) == {
        "r002": "missing_after_rules:review_rate",
        "r005": "missing_after_rules:review_rate",
    }
    kept = result.frame.set_index("row_id")["review_rate"]
    assert kept.to_dict() == {"r000": 0.0, "r001": 0.0, "r003": 4.5, "r004": 3.0}
    assert_adds_up(result, 6)


def test_conditional_fill_otherwise_quarantine():
    spec = make_spec([{**FILL, "otherwise": "quarantine"}])
    result = validate_and_clean(make_frame(review_count=COUNTS, review_rate=RATES), spec)
    assert steps(result)[("rules[0]:unfilled:review_rate", "quarantine")] == 2
    assert reasons_by_id(result) == {
        "r002": "rules[0]:unfilled:review_rate",
        "r005": "rules[0]:unfilled:review_rate",
    }
    assert_adds_up(result, 6)


def test_unconditional_fill_fills_every_missing_value():
    spec = make_spec([{"kind": "fill", "column": "review_rate", "value": 2.5}])
    result = validate_and_clean(make_frame(review_count=COUNTS, review_rate=RATES), spec)
    assert steps(result)[("rules[0]:fill:review_rate", "fill")] == 4
    assert len(result.quarantine) == 0
    assert result.frame["review_rate"].tolist() == [2.5, 2.5, 2.5, 4.5, 3.0, 2.5]


def test_fill_on_a_text_column_reports_but_keeps_rows_outside_the_condition():
    # Categorical nulls are model-ready (they map to the unknown id), so an unfilled one stays in the table.
    spec = make_spec(
        [{"kind": "fill", "column": "region", "value": "remote", "when": {"column": "depot", "equals": "d1"}}]
    )
    frame = make_frame(region=[None, None, "south", None], depot=["d1", "d2", "d1", "d1"])
    result = validate_and_clean(frame, spec)
    assert result.frame["region"].tolist()[:1] == ["remote"]
    assert pd.isna(result.frame["region"].iloc[1])
    assert steps(result)[("rules[0]:fill:region", "fill")] == 2
    assert steps(result)[("rules[0]:unfilled:region", "report")] == 1
    assert len(result.quarantine) == 0


def test_a_text_column_declared_not_nullable_is_checked_again_after_the_rules():
    # The fill rule defers the null check on "region"; what it leaves missing is then not model-ready.
    spec = make_spec(
        [{"kind": "fill", "column": "region", "value": "remote", "when": {"column": "depot", "equals": "d1"}}],
        onehot=[{"name": "region", "nullable": False}],
    )
    frame = make_frame(region=[None, None, "south"], depot=["d1", "d2", "d1"])
    result = validate_and_clean(frame, spec)
    assert result.frame["region"].tolist() == ["remote", "south"]
    assert reasons_by_id(result) == {"r001": "missing_after_rules:region"}


def test_fill_condition_on_missing_and_on_a_yaml_boolean():
    spec = make_spec(
        [{"kind": "fill", "column": "review_rate", "value": 1, "when": {"column": "region", "is_missing": True}}]
    )
    frame = make_frame(region=[None, "north", None], review_rate=[np.nan, np.nan, 2.0])
    result = validate_and_clean(frame, spec)
    assert steps(result)[("rules[0]:fill:review_rate", "fill")] == 1
    assert reasons_by_id(result) == {"r001": "missing_after_rules:review_rate"}
    # YAML reads an unquoted `yes` as true; a text column holding "yes" must still match it.
    spec = make_spec(
        [{"kind": "fill", "column": "review_rate", "value": 1, "when": {"column": "region", "equals": True}}]
    )
    frame = make_frame(region=["yes", "no", "Yes"], review_rate=[np.nan, np.nan, np.nan])
    result = validate_and_clean(frame, spec)
    assert steps(result)[("rules[0]:fill:review_rate", "fill")] == 2
    assert reasons_by_id(result) == {"r001": "missing_after_rules:review_rate"}


def test_fill_with_text_into_a_numeric_column_is_a_spec_error():
    spec = make_spec([{"kind": "fill", "column": "review_rate", "value": "none"}])
    with pytest.raises(SpecError, match=r"rules\[0\]\.value.*review_rate"):
        validate_and_clean(make_frame(review_rate=[np.nan, 1.0]), spec)


# --- drop_missing and order -------------------------------------------------------------------------------------


def test_drop_missing_quarantines_missing_text_and_numbers():
    spec = make_spec([{"kind": "drop_missing", "column": "region"}, {"kind": "drop_missing", "column": "review_rate"}])
    frame = make_frame(region=["a", " ", None, "b", "c"], review_rate=[1.0, 2.0, 3.0, np.nan, np.nan])
    result = validate_and_clean(frame, spec)
    assert reasons_by_id(result) == {
        "r001": "rules[0]:drop_missing:region",  # a blank value is missing
        "r002": "rules[0]:drop_missing:region",
        "r003": "rules[1]:drop_missing:review_rate",
        "r004": "rules[1]:drop_missing:review_rate",
    }
    assert_adds_up(result, 5)


def test_rule_order_matters():
    frame = make_frame(review_count=COUNTS, review_rate=RATES)
    drop = {"kind": "drop_missing", "column": "review_rate"}
    fill_first = validate_and_clean(frame, make_spec([FILL, drop]))
    drop_first = validate_and_clean(frame, make_spec([drop, FILL]))
    # Filling first rescues the two no-review rows; dropping first loses all four missing rates.
    assert len(fill_first.frame) == 4 and len(drop_first.frame) == 2
    assert steps(fill_first)[("rules[1]:drop_missing:review_rate", "quarantine")] == 2
    assert steps(drop_first)[("rules[0]:drop_missing:review_rate", "quarantine")] == 4
    assert steps(drop_first)[("rules[1]:fill:review_rate", "fill")] == 0


def test_a_row_leaves_at_the_first_rule_that_rejects_it():
    rules = [
        {"kind": "range", "column": "price", "max": 500},
        {"kind": "range", "column": "review_count", "max": 3},
    ]
    frame = make_frame(price=[100.0, 900.0, 900.0], review_count=[1.0, 1.0, 9.0])
    result = validate_and_clean(frame, make_spec(rules))
    assert reasons_by_id(result) == {"r001": "rules[0]:range:price", "r002": "rules[0]:range:price"}
    assert steps(result)[("rules[1]:range:review_count", "quarantine")] == 0


# --- validation reasons -----------------------------------------------------------------------------------------


def test_every_validation_failure_of_a_row_is_listed():
    spec = make_spec(
        numeric=[{"name": "review_count", "min": 0, "max": 100}, {"name": "review_rate", "nullable": False}]
    )
    frame = make_frame(
        review_count=["1", "-4", "many", "2"],
        review_rate=[1.0, np.nan, np.nan, np.inf],
        price=["10", "x", "12", "13"],
    )
    result = validate_and_clean(frame, spec)
    assert reasons_by_id(result) == {
        "r001": "range:review_count;null:review_rate;coerce:price",
        "r002": "coerce:review_count;null:review_rate",
        "r003": "infinite:review_rate",
    }
    s = steps(result)
    assert s[("null:review_rate", "quarantine")] == 2
    assert s[("coerce:review_count", "quarantine")] == 1
    assert s[("coerce:price", "quarantine")] == 1
    # Values as read stay in the quarantine: the text that could not be read as a number is shown as it was.
    assert result.quarantine.set_index("row_id").loc["r002", "review_count"] == "many"
    assert_adds_up(result, 4)


def test_duplicate_ids_quarantine_every_row_sharing_the_id():
    frame = make_frame(price=[1.0, 2.0, 3.0, 4.0, 5.0])
    frame["row_id"] = ["a", "b", "a", "c", "a "]  # trimmed, "a " is "a" too
    result = validate_and_clean(frame, make_spec())
    assert sorted(result.quarantine["_source_row"]) == [1, 3, 5]
    assert set(result.quarantine["_reasons"]) == {"duplicate_id"}
    assert steps(result)[("duplicate_id", "quarantine")] == 3
    assert sorted(result.frame["row_id"]) == ["b", "c"]


def test_ids_are_text_with_leading_zeros_kept():
    frame = make_frame(price=[1.0, 2.0])
    frame["row_id"] = ["00123", "123"]
    result = validate_and_clean(frame, make_spec())
    assert result.frame["row_id"].tolist() == ["00123", "123"]
    assert len(result.quarantine) == 0


def test_missing_id_and_missing_target_without_a_rule():
    frame = make_frame(price=[1.0, np.nan, 3.0])
    frame.loc[2, "row_id"] = None
    result = validate_and_clean(frame, make_spec())
    assert sorted(result.quarantine["_reasons"]) == ["null:price", "null:row_id"]


def test_missing_target_with_a_drop_missing_rule_counts_under_the_rule():
    spec = make_spec([{"kind": "drop_missing", "column": "price"}])
    result = validate_and_clean(make_frame(price=[1.0, np.nan, 3.0]), spec)
    assert reasons_by_id(result) == {"r001": "rules[0]:drop_missing:price"}


@pytest.mark.parametrize(
    ("label", "expected"),
    [("1", 1.0), ("0", 0.0), ("1.0", 1.0), ("yes", 1.0), ("No", 0.0), (" TRUE ", 1.0), ("false", 0.0)],
)
def test_binary_target_labels_read_as_one_and_zero(label, expected):
    spec = make_spec(target={"column": "price", "task": "binary"})
    result = validate_and_clean(make_frame(price=[label, "0"]), spec)
    assert result.frame["price"].tolist() == [expected, 0.0]


def test_binary_target_other_values_quarantine_the_row():
    spec = make_spec(target={"column": "price", "task": "binary"})
    frame = make_frame(price=["1", "2", "maybe", "-1", "0"])
    result = validate_and_clean(frame, spec)
    assert reasons_by_id(result) == {"r001": "binary:price", "r002": "coerce:price", "r003": "binary:price"}
    frame = make_frame(price=[True, False, True])
    assert validate_and_clean(frame, spec).frame["price"].tolist() == [1.0, 0.0, 1.0]


def test_numeric_nullable_without_a_rule_is_caught_by_model_readiness():
    result = validate_and_clean(make_frame(review_rate=[1.0, np.nan]), make_spec())
    assert reasons_by_id(result) == {"r001": "missing_after_rules:review_rate"}
    assert steps(result)[("missing_after_rules:review_rate", "quarantine")] == 1


def test_all_rows_quarantined_is_an_input_error_that_keeps_the_quarantine():
    with pytest.raises(InputError, match=r"all 3 row\(s\) were quarantined.*null:price \(3\)") as caught:
        validate_and_clean(make_frame(price=[np.nan] * 3), make_spec())
    assert len(caught.value.quarantine) == 3
    assert caught.value.ledger.rows_quarantined == 3


# --- the ledger -------------------------------------------------------------------------------------------------


def test_ledger_adds_up_and_counts_each_row_once():
    spec = make_spec(
        [FILL, {"kind": "range", "column": "price", "max": 500}],
        numeric=[{"name": "review_count", "min": 0}, {"name": "review_rate", "nullable": True}],
    )
    frame = make_frame(
        review_count=[0.0, -1.0, 3.0, 0.0, 1.0, 1.0],
        review_rate=[np.nan, np.nan, np.nan, 2.0, 1.0, 1.0],
        price=[1.0, "bad", 2.0, 900.0, 3.0, 4.0],
    )
    result = validate_and_clean(frame, spec)
    ledger = result.ledger
    assert reasons_by_id(result)["r001"] == "range:review_count;coerce:price"
    # Per-reason counts may overlap (r001 has two), the row total may not.
    assert sum(ledger.quarantined_by_reason().values()) == ledger.rows_quarantined + 1
    assert ledger.rows_quarantined == 3
    assert ledger.rows_used == 3
    ledger.check(len(result.frame), len(result.quarantine))
    again = Ledger.from_dict(ledger.to_dict())
    assert again.to_dict() == ledger.to_dict()


def test_ledger_check_fires_when_counts_do_not_add_up():
    ledger = Ledger(rows_in=10, rows_quarantined=3)
    ledger.check(7, 3)
    with pytest.raises(LedgerMismatch, match="10 in, 6 used"):
        ledger.check(6, 3)
    with pytest.raises(LedgerMismatch):
        ledger.check(8, 2)


def test_a_rule_that_loses_rows_is_caught(monkeypatch):
    real = cleaning.RULES["range"]

    def leaky(frame, rule, i, raw):
        outcome = real(frame, rule, i, raw)
        outcome.frame = outcome.frame.iloc[1:]  # one row vanishes without a reason
        return outcome

    monkeypatch.setitem(cleaning.RULES, "range", leaky)
    spec = make_spec([{"kind": "range", "column": "price", "max": 500}])
    with pytest.raises(LedgerMismatch, match="5 in, 3 used"):
        validate_and_clean(make_frame(price=[1.0, 2.0, 3.0, 4.0, 900.0]), spec)
