"""Vocabularies: id 0 is unknown, ids are stable across versions, lookups agree with pandas."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from entivec.schemas.vector_set import VectorSet, column_file_stem
from entivec.schemas.vocabulary import UNKNOWN, Vocabulary


def test_ids_follow_frequency_and_zero_is_unknown():
    v = Vocabulary.build("c", pd.Series(["b", "a", "b", None, "c", "b", "a"]))
    assert v.categories == [UNKNOWN, "b", "a", "c"]
    assert v.counts == [1, 3, 2, 1] and v.unknown_count == 1
    assert v.encode(pd.Series(["a", "zzz", None, "c"])).tolist() == [2, 0, 0, 3]


def test_rare_categories_map_to_unknown_and_are_counted_there():
    v = Vocabulary.build("c", pd.Series(["a"] * 5 + ["b"] * 2 + ["c"]), min_count=2)
    assert v.categories == [UNKNOWN, "a", "b"]
    assert v.counts[0] == 1 and sum(v.counts) == 8


def test_retrain_keeps_every_known_id_and_appends_new():
    old = Vocabulary.build("c", pd.Series(list("aaabbc")))
    new = Vocabulary.build("c", pd.Series(list("ddddcce")), previous=old)
    assert new.categories[: old.size] == old.categories
    assert new.categories[old.size :] == ["d", "e"]
    assert new.counts[new.categories.index("a")] == 0  # known but absent now: id kept, count 0
    # A value keeps its id across the versions.
    values = pd.Series(["a", "b", "c"])
    assert (old.encode(values) == new.encode(values)).all()


def test_encode_agrees_with_pandas_categorical_codes():
    # Reference: pandas.Categorical codes (-1 for values outside the categories), shifted by one.
    rng = np.random.default_rng(0)
    values = pd.Series(rng.choice([f"k{i}" for i in range(300)] + [None], size=5_000))
    v = Vocabulary.build("c", values.iloc[:4_000])
    expected = pd.Categorical(values.astype("string"), categories=v.categories[1:]).codes + 1
    assert (v.encode(values) == expected).all()


def test_spelling_is_normalised_for_numbers_and_spaces():
    v = Vocabulary.build("c", pd.Series(["7", " 8 ", ""]))
    assert v.categories == [UNKNOWN, "7", "8"]
    assert v.encode(pd.Series(["8", "7 ", "  "])).tolist() == [2, 1, 0]


def test_round_trip_and_vector_set_layout(tmp_path):
    v = Vocabulary.build("store/id", pd.Series(["x", "y", "x"]))
    vs = VectorSet({"store/id": v}, {"store/id": np.arange(6, dtype=np.float32).reshape(3, 2)}, {"k": 1})
    vs.save(tmp_path / "vs")
    back = VectorSet.load(tmp_path / "vs")
    assert back.vocabularies["store/id"].categories == v.categories
    assert np.array_equal(back.vectors["store/id"], vs.vectors["store/id"])
    assert back.lookup("store/id", ["y", "nope"]).tolist() == [[4.0, 5.0], [0.0, 1.0]]
    assert "/" not in column_file_stem("store/id")
    # Stable across processes: Python's own str hash is salted per process (PYTHONHASHSEED), so a name built from
    # it would differ in a second interpreter; ask two interpreters with different salts.
    import subprocess
    import sys

    probe = "from entivec.schemas.vector_set import column_file_stem as f; print(f('store/id'))"
    names = {
        subprocess.run(
            [sys.executable, "-c", probe],
            capture_output=True, text=True, check=True, env={**os.environ, "PYTHONHASHSEED": seed},
        ).stdout.strip()
        for seed in ("1", "2")
    }
    assert names == {column_file_stem("store/id")}


def test_confidence_round_trips_with_the_vector_set(tmp_path):
    v = Vocabulary.build("depot", pd.Series(["a", "b", "a"]))
    table = pd.DataFrame({
        "id": [0, 1, 2], "category": v.categories, "count": [0, 2, 1], "spread": [np.nan, 0.1, 0.4],
        "relative_spread": [np.nan, 0.05, 0.2], "in_all_folds": [False, True, False],
    })
    vs = VectorSet({"depot": v}, {"depot": np.ones((3, 2), dtype=np.float32)}, {}, {"depot": table})
    back = VectorSet.load(vs.save(tmp_path / "vs"))
    pd.testing.assert_frame_equal(back.confidence["depot"], table)
    with pytest.raises(ValueError, match="one row per vocabulary id"):
        VectorSet({"depot": v}, {"depot": np.ones((3, 2))}, {}, {"depot": table.iloc[:2]})


def test_vector_rows_must_match_vocabulary():
    v = Vocabulary.build("c", pd.Series(["x"]))
    with pytest.raises(ValueError, match="2 vocabulary ids"):
        VectorSet({"c": v}, {"c": np.zeros((3, 2))})
