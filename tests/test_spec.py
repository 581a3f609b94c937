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
    """The error's message with the file's path cut out: the path holds the test's own name (pytest's tmp_path),
    so a word checked in the raw message could match the path instead of the explanation."""
    path = write(tmp_path, data)
    with pytest.raises(SpecError) as info:
        load_spec(path)
    message = str(info.value)
    assert str(path) in message, message
    return message.replace(str(path), "<spec file>")


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
    with pytest.raises(SpecError, match=r"absent\.yaml: not found"):
        load_spec(tmp_path / "absent.yaml")


def test_bad_model_name(tmp_path):
    message = error_of(tmp_path, {**GOOD, "name": "has space"})
    assert "key 'name'" in message and "'has space'" in message, message


def test_every_problem_is_reported_at_once(tmp_path):
    message = error_of(tmp_path, {**GOOD, "training": {"epochs": 0, "dropout": 2}, "extra": 1})
    assert "3 problem(s)" in message


def test_repeated_key_is_an_error_naming_both_lines(tmp_path):
    # YAML 1.2 (yaml.org/spec/1.2.2, section 3.2.1.1, quoted from memory): the content of a mapping node is an
    # unordered set of key/value node pairs, "with the restriction that each of the keys is unique". PyYAML keeps
    # the last one silently.
    text = yaml.safe_dump(GOOD, sort_keys=False) + "training:\n  epochs: 3\ntraining:\n  epochs: 9\n"
    message = error_of(tmp_path, text)
    assert "key 'training' appears twice" in message and "lines 13 and 15" in message, message


def test_repeated_nested_key_is_an_error(tmp_path):
    text = yaml.safe_dump(GOOD, sort_keys=False).replace("  task: regression\n",
                                                         "  task: regression\n  column: z\n")
    assert "key 'column' appears twice" in error_of(tmp_path, text)


@pytest.mark.parametrize(("section", "key"), [("training", "epochs"), ("training", "learning_rate"),
                                              ("split", "test_fraction"), ("evaluation", "folds")])
def test_boolean_where_a_number_belongs(tmp_path, section, key):
    # YAML 1.1 (yaml.org/type/bool.html) reads true/yes/on as booleans; Python's bool is an int subclass, so
    # without the check `epochs: true` became 1 epoch.
    message = error_of(tmp_path, {**GOOD, section: {key: True}})
    assert f"key '{section}.{key}': takes a number, got the boolean true" in message, message


def test_boolean_where_a_boolean_belongs_still_loads(tmp_path):
    spec = load_spec(write(tmp_path, {**GOOD, "training": {"progress": False}}))
    assert spec.training.progress is False


@pytest.mark.parametrize("bound", [".nan", ".inf", "-.inf"])
def test_nan_or_infinite_bound_is_an_error(tmp_path, bound):
    # YAML 1.1 float type (yaml.org/type/float.html) spells not-a-number `.nan` and infinity `.inf`; IEEE 754
    # makes every comparison with NaN false, so a NaN bound would quarantine every row.
    text = yaml.safe_dump(GOOD, sort_keys=False) + f"rules:\n  - kind: range\n    column: x\n    min: {bound}\n"
    message = error_of(tmp_path, text)
    assert "rules[0].min" in message and "finite number" in message, message


def test_empty_model_list_is_an_error(tmp_path):
    message = error_of(tmp_path, {**GOOD, "evaluation": {"models": []}})
    assert "key 'evaluation.models'" in message and "at least 1 item" in message, message


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
