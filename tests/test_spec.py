"""The spec file: every mistake is an error that names the file, the key and what was expected."""

from __future__ import annotations

import math

import pytest
import yaml

from entivec.schemas.spec import SpecError, embedding_size, load_spec

GOOD = {
    "name": "shop-sales",
    "source": {"path": "data.csv"},
    "id_column": "id",
    "target": {"column": "y", "task": "regression"},
    "columns": {"embed": ["shop"], "numeric": ["x"]},
}


def write(tmp_path, data, name="spec.yaml"):
    path = tmp_path / name
    path.write_text(yaml.safe_dump(data) if not isinstance(data, str) else data)
    return path


def error_of(tmp_path, data) -> str:
    path = write(tmp_path, data)
    with pytest.raises(SpecError) as info:
        load_spec(path)
    message = str(info.value)
    assert str(path) in message, message
    return message


def test_good_spec_loads_with_defaults(tmp_path):
    spec = load_spec(write(tmp_path, GOOD))
    assert spec.embed_names == ["shop"] and spec.numeric_names == ["x"]
    assert spec.split.method == "random" and spec.training.patience >= 1
    assert len(spec.content_hash()) == 64


def test_unknown_top_level_key_gets_a_did_you_mean(tmp_path):
    message = error_of(tmp_path, {**GOOD, "trainng": {"epochs": 3}})
    assert "unknown key 'trainng'" in message and "did you mean 'training'" in message


def test_unknown_nested_key_names_its_path(tmp_path):
    message = error_of(tmp_path, {**GOOD, "training": {"epoch": 3}})
    assert "unknown key 'training.epoch'" in message and "did you mean 'epochs'" in message


def test_wrong_type_names_key_and_value(tmp_path):
    message = error_of(tmp_path, {**GOOD, "training": {"epochs": "ten"}})
    assert "training.epochs" in message and "'ten'" in message and "integer" in message


def test_missing_required_key(tmp_path):
    data = dict(GOOD)
    del data["target"]
    assert "missing required key 'target'" in error_of(tmp_path, data)


def test_wrong_task_lists_the_choices(tmp_path):
    message = error_of(tmp_path, {**GOOD, "target": {"column": "y", "task": "multiclass"}})
    assert "target.task" in message and "'regression'" in message and "'binary'" in message


def test_rule_with_unknown_kind_and_unknown_column(tmp_path):
    message = error_of(tmp_path, {**GOOD, "rules": [{"kind": "clip", "column": "x"}]})
    assert "rules[0]" in message and "kind" in message
    message = error_of(tmp_path, {**GOOD, "rules": [{"kind": "drop_missing", "column": "nope"}]})
    assert "rules[0]" in message and "'nope'" in message


def test_fill_rule_typo_inside_condition(tmp_path):
    rule = {"kind": "fill", "column": "x", "value": 0, "when": {"column": "y", "equal": 0}}
    message = error_of(tmp_path, {**GOOD, "rules": [rule]})
    assert "unknown key 'rules[0].when.equal'" in message and "did you mean 'equals'" in message


def test_column_in_two_roles(tmp_path):
    message = error_of(tmp_path, {**GOOD, "columns": {"embed": ["shop"], "numeric": ["shop"]}})
    assert "'shop'" in message and "columns.embed" in message and "columns.numeric" in message


def test_time_split_needs_column_and_cutoff(tmp_path):
    assert "time_column and cutoff" in error_of(tmp_path, {**GOOD, "split": {"method": "time"}})


def test_not_yaml_not_mapping_and_missing_file(tmp_path):
    assert "not valid YAML" in error_of(tmp_path, "name: [unclosed\n")
    assert "expected a mapping" in error_of(tmp_path, "- a\n- b\n")
    with pytest.raises(SpecError, match="not found"):
        load_spec(tmp_path / "absent.yaml")


def test_bad_model_name(tmp_path):
    assert "name" in error_of(tmp_path, {**GOOD, "name": "has space"})


def test_every_problem_is_reported_at_once(tmp_path):
    message = error_of(tmp_path, {**GOOD, "training": {"epochs": 0, "dropout": 2}, "extra": 1})
    assert "3 problem(s)" in message


@pytest.mark.parametrize("n", [2, 7, 50, 2_000, 50_000])
def test_size_rules(n):
    # fourth_root and half_capped: common practice, no source. power_056 is the default rule of the fastai
    # library, min(600, round(1.6 * n ** 0.56)) (Howard & Gugger 2020); the formula is quoted from memory.
    assert embedding_size(n, "fourth_root") == math.ceil(n**0.25)
    assert embedding_size(n, "half_capped") == min(50, math.ceil(n / 2))
    assert embedding_size(n, "power_056") == min(600, round(1.6 * n**0.56))


def test_size_rule_figures_from_memory():
    # Values worked by hand here: 50_000 ** 0.25 = 14.95 -> 15; 1.6 * 50 ** 0.56 = 14.31 -> 14.
    assert embedding_size(50_000, "fourth_root") == 15
    assert embedding_size(50, "power_056") == 14
