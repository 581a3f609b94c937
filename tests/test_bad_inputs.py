"""Malformed specs and input files: each stops with the right exception and a message naming file and column/key."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest
import yaml

from entivec.schemas.spec import SpecError, load_spec
from entivec.tasks.ingest.clean import validate_and_clean
from entivec.tasks.ingest.read import InputError, read_source
from entivec.tasks.ingest.split import split_rows

MODEL = "depots"
HEADER = "shipment,depot,weight,cost,shipped"
ROWS = [
    "s001,north,1.5,10.0,2024-01-03",
    "s002,south,2.5,12.0,2024-02-10",
    "s003,Zürich,3.0,9.5,2024-03-15",
    "s004,north,0.5,11.0,2024-04-01",
]
SPEC = {
    "name": MODEL,
    "source": {"path": "data.csv"},
    "id_column": "shipment",
    "target": {"column": "cost", "task": "regression"},
    "columns": {"embed": ["depot"], "numeric": ["weight"]},
}


def write_spec(folder: Path, raw: dict | str) -> Path:
    path = folder / "spec.yaml"
    text = raw if isinstance(raw, str) else yaml.safe_dump(raw, sort_keys=False, allow_unicode=True)
    path.write_text(text, encoding="utf-8")
    return path


def write_csv(folder: Path, name: str = "data.csv", header: str = HEADER, rows=ROWS, sep: str = ",") -> Path:
    path = folder / name
    lines = [header.replace(",", sep), *(r.replace(",", sep) for r in rows)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def with_spec(**changes) -> dict:
    out = {**SPEC}
    out.update(changes)
    return out


@dataclass
class Case:
    """One malformed input: how to build it, which exception it must raise, what the message must name."""

    name: str
    build: Callable[[Path], Path]  # returns the spec path
    error: type[Exception]
    fragments: tuple[str, ...]  # each must appear in the message ("{folder}" is replaced by the case folder)


def run_pipeline(spec_path: Path):
    """The function-level path a train run takes up to the split."""
    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    result = validate_and_clean(raw, spec, files)
    split_rows(result.frame, spec.split)
    return result


# --- the builders -----------------------------------------------------------------------------------------------


def spec_typo_key(d):
    write_csv(d)
    return write_spec(d, with_spec(target={"column": "cost", "task": "regression", "tranform": "log"}))


def spec_wrong_type(d):
    write_csv(d)
    return write_spec(d, with_spec(split={"test_fraction": "a fifth"}))


def spec_missing_key(d):
    write_csv(d)
    raw = with_spec()
    del raw["target"]  # id_column is optional since the row number can be the id
    return write_spec(d, raw)


def spec_rule_on_undeclared_column(d):
    write_csv(d)
    return write_spec(d, with_spec(rules=[{"kind": "drop_missing", "column": "wieght"}]))


def spec_not_yaml(d):
    write_csv(d)
    return write_spec(d, "name: depots\nsource: {path: data.csv\nid_column: shipment\n")


def spec_fill_text_into_numbers(d):
    write_csv(d)
    return write_spec(d, with_spec(rules=[{"kind": "fill", "column": "weight", "value": "unknown"}]))


def spec_range_on_text_column(d):
    write_csv(d)
    return write_spec(d, with_spec(rules=[{"kind": "range", "column": "depot", "min": 1}]))


def spec_unparsable_cutoff(d):
    write_csv(d)
    split = {"method": "time", "time_column": "shipped", "cutoff": "next tuesday"}
    return write_spec(d, with_spec(split=split))


def glob_matches_nothing(d):
    write_csv(d)
    return write_spec(d, with_spec(source={"path": "exports/*.csv"}))


def file_not_found(d):
    write_csv(d)
    return write_spec(d, with_spec(source={"path": "dta.csv"}))


def folder_instead_of_file(d):
    (d / "exports").mkdir()
    return write_spec(d, with_spec(source={"path": "exports"}))


def unsupported_suffix(d):
    (d / "data.xlsx").write_bytes(b"PK\x03\x04 not really a workbook")
    return write_spec(d, with_spec(source={"path": "data.xlsx"}))


def empty_file(d):
    (d / "data.csv").write_bytes(b"")
    return write_spec(d, with_spec())


def header_only(d):
    write_csv(d, rows=[])
    return write_spec(d, with_spec())


def missing_column(d):
    write_csv(d, header="shipment,depot,Weight,cost,shipped")
    return write_spec(d, with_spec())


def wrong_delimiter(d):
    write_csv(d, sep=";")
    return write_spec(d, with_spec())


def wrong_encoding(d):
    # "Zürich" written in latin-1 (one byte 0xfc for ü) while the spec says utf-8.
    text = "\n".join([HEADER, *ROWS]) + "\n"
    (d / "data.csv").write_bytes(text.encode("latin-1"))
    return write_spec(d, with_spec())


def unknown_encoding(d):
    write_csv(d)
    return write_spec(d, with_spec(source={"path": "data.csv", "encoding": "utf-9"}))


def glob_files_differ(d):
    write_csv(d, name="part1.csv")
    write_csv(d, name="part2.csv", header=HEADER + ",note", rows=[r + ",late" for r in ROWS])
    return write_spec(d, with_spec(source={"path": "part*.csv"}))


def corrupt_parquet(d):
    (d / "data.parquet").write_bytes(b"this is not parquet at all" * 10)
    return write_spec(d, with_spec(source={"path": "data.parquet"}))


def truncated_parquet(d):
    frame = pd.read_csv(write_csv(d), dtype=str)
    frame.to_parquet(d / "data.parquet")
    whole = (d / "data.parquet").read_bytes()
    (d / "data.parquet").write_bytes(whole[: len(whole) // 2])
    return write_spec(d, with_spec(source={"path": "data.parquet"}))


def repeated_header(d):
    write_csv(d, header="shipment,depot,weight,cost,weight", rows=[r.rsplit(",", 1)[0] + ",1.0" for r in ROWS])
    return write_spec(d, with_spec())


def reserved_column(d):
    write_csv(d, header=HEADER + ",_source_row", rows=[r + ",1" for r in ROWS])
    return write_spec(d, with_spec())


def binary_target_not_binary(d):
    write_csv(d, rows=[r.replace(",10.0,", ",2,").replace(",12.0,", ",2,") for r in ROWS[:2]])
    return write_spec(d, with_spec(target={"column": "cost", "task": "binary"}))


def all_rows_quarantined(d):
    write_csv(d, rows=[r.replace("north", "") for r in ROWS])
    spec = with_spec(columns={"embed": [{"name": "depot", "nullable": False}], "numeric": ["weight"]})
    return write_spec(d, {**spec, "rules": [{"kind": "range", "column": "weight", "max": 2}]})


def cutoff_not_a_number_for_year(d):
    write_csv(d, header="shipment,depot,weight,cost,year", rows=[r[:-6] for r in ROWS])
    return write_spec(d, with_spec(split={"method": "time", "time_column": "year", "cutoff": "2024-06-01"}))


def time_split_side_empty(d):
    write_csv(d)
    return write_spec(d, with_spec(split={"method": "time", "time_column": "shipped", "cutoff": "2030-01-01"}))


CASES = [
    Case("spec_typo_key", spec_typo_key, SpecError, ("spec.yaml", "target.tranform", "did you mean 'transform'")),
    Case("spec_wrong_type", spec_wrong_type, SpecError, ("spec.yaml", "split.test_fraction", "a fifth")),
    Case("spec_missing_key", spec_missing_key, SpecError, ("spec.yaml", "missing required key 'target'")),
    Case("spec_rule_undeclared", spec_rule_on_undeclared_column, SpecError, ("spec.yaml", "rules[0]", "'wieght'")),
    Case("spec_not_yaml", spec_not_yaml, SpecError, ("spec.yaml", "not valid YAML", "line")),
    Case("spec_fill_text", spec_fill_text_into_numbers, SpecError, ("spec.yaml", "rules[0].value", "'weight'")),
    Case("spec_range_on_text", spec_range_on_text_column, SpecError, ("spec.yaml", "rules[0]", "'depot'")),
    Case("spec_bad_cutoff", spec_unparsable_cutoff, SpecError, ("spec.yaml", "split.cutoff", "next tuesday")),
    Case("glob_no_match", glob_matches_nothing, InputError, ("exports/*.csv", "no file matches", "source.path")),
    Case("file_not_found", file_not_found, InputError, ("dta.csv", "not found", "did you mean", "data.csv")),
    Case("folder_not_file", folder_instead_of_file, InputError, ("exports", "is a folder", "source.path")),
    Case("unsupported_suffix", unsupported_suffix, InputError, ("data.xlsx", "'.xlsx'", "source.format")),
    Case("empty_file", empty_file, InputError, ("data.csv", "empty")),
    Case("header_only", header_only, InputError, ("data.csv", "no data rows")),
    Case("missing_column", missing_column, InputError, ("data.csv", "'weight'", "columns.numeric[0]", "'Weight'")),
    Case("wrong_delimiter", wrong_delimiter, InputError, ("data.csv", "'shipment'", "';'-delimited", "delimiter")),
    Case("wrong_encoding", wrong_encoding, InputError, ("data.csv", "utf-8", "0xfc", "line 4", "source.encoding")),
    Case("unknown_encoding", unknown_encoding, InputError, ("data.csv", "'utf-9'", "source.encoding")),
    Case("glob_files_differ", glob_files_differ, InputError, ("part2.csv", "'note'", "part1.csv")),
    Case("corrupt_parquet", corrupt_parquet, InputError, ("data.parquet", "Parquet")),
    Case("truncated_parquet", truncated_parquet, InputError, ("data.parquet", "Parquet")),
    Case("repeated_header", repeated_header, InputError, ("data.csv", "'weight'", "more than once")),
    Case("reserved_column", reserved_column, InputError, ("data.csv", "'_source_row'", "reserves")),
    Case("binary_target_2", binary_target_not_binary, InputError, ("data.csv", "binary:cost", "all 2 row(s)")),
    Case("all_quarantined", all_rows_quarantined, InputError, ("data.csv", "all 4 row(s)", "null:depot (2)")),
    Case("cutoff_vs_year", cutoff_not_a_number_for_year, SpecError, ("split.cutoff", "'year'", "2024-06-01")),
    Case("time_side_empty", time_split_side_empty, InputError, ("'shipped'", "split.cutoff", "test part empty")),
]
IDS = [c.name for c in CASES]


def test_cases_are_distinct():
    assert len(set(IDS)) == len(IDS) >= 15


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_function_level_failure(case: Case, tmp_path):
    spec_path = case.build(tmp_path)
    with pytest.raises(Exception) as caught:  # noqa: B017 - the exact type is asserted just below
        run_pipeline(spec_path)
    assert type(caught.value) is case.error, f"{case.name}: {type(caught.value).__name__}: {caught.value}"
    message = str(caught.value)
    for fragment in case.fragments:
        assert fragment in message, f"{case.name}: {fragment!r} not in {message!r}"


# --- row-level faults: the run goes on, the rows are quarantined with a reason naming the column ----------------


def test_binary_target_with_a_two_quarantines_only_that_row(tmp_path):
    rows = [ROWS[0].replace(",10.0,", ",1,"), ROWS[1].replace(",12.0,", ",2,"), ROWS[2].replace(",9.5,", ",no,")]
    write_csv(tmp_path, rows=rows)
    result = run_pipeline(write_spec(tmp_path, with_spec(target={"column": "cost", "task": "binary"})))
    assert result.quarantine[["_source_row", "_reasons"]].values.tolist() == [[2, "binary:cost"]]
    assert result.frame["cost"].tolist() == [1.0, 0.0]


def test_unreadable_times_and_numbers_quarantine_rows(tmp_path):
    rows = [ROWS[0], ROWS[1].replace("2024-02-10", "sometime"), ROWS[2].replace(",3.0,", ",3 kg,"), ROWS[3]]
    write_csv(tmp_path, rows=rows)
    split = {"method": "time", "time_column": "shipped", "cutoff": "2024-02-01"}
    result = run_pipeline(write_spec(tmp_path, with_spec(split=split)))
    reasons = dict(zip(result.quarantine["_source_row"], result.quarantine["_reasons"], strict=True))
    assert reasons == {2: "time:shipped", 3: "coerce:weight"}
    assert result.quarantine.loc[1, "weight"] == "3 kg"


# --- the same cases through the command line ------------------------------------------------------------------

CLI_CASES = [c for c in CASES if c.error in (SpecError, InputError)]


def _squash(text: str) -> str:
    # Consoles wrap long lines; compare with runs of whitespace folded to one space.
    return " ".join(text.split())


@pytest.mark.parametrize("case", CLI_CASES, ids=[c.name for c in CLI_CASES])
def test_cli_level_failure(case: Case, tmp_path, request):
    run_cli = request.getfixturevalue("run_cli")  # gives this test a fresh project folder: no version yet
    spec_path = case.build(tmp_path)
    code, output = run_cli(["train", str(spec_path)])
    assert code == 2, f"{case.name}: exit code {code}\n{output}"
    squashed = _squash(output)
    for fragment in case.fragments:
        assert _squash(fragment) in squashed, f"{case.name}: {fragment!r} not in output:\n{output}"
    assert request.getfixturevalue("registered_versions")(MODEL) == 0


def test_a_run_that_rejects_every_row_still_writes_its_quarantine(tmp_path, request):
    # Every row fails (a null depot where nulls are not allowed, or a weight over the range's maximum), so the
    # run stops; the rejected rows and their reasons must still reach a file someone can open.
    run_cli = request.getfixturevalue("run_cli")
    home = request.getfixturevalue("entivec_home")
    code, output = run_cli(["train", str(all_rows_quarantined(tmp_path))])
    assert code == 2, output
    written = sorted((Path(home) / "quarantine").glob(f"{MODEL}-*/quarantine.parquet"))
    assert len(written) == 1, output
    assert str(written[0]) in "".join(output.split()), output  # the message names the file (console may wrap)
    kept = pd.read_parquet(written[0])
    assert sorted(kept["_source_row"].tolist()) == [1, 2, 3, 4]
    assert kept.set_index("_source_row").loc[1, "_reasons"] == "null:depot"  # "north" blanked: a null depot
    assert (written[0].parent / "quarantine.csv").exists()
    assert request.getfixturevalue("registered_versions")(MODEL) == 0
