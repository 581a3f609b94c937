"""Reading a dataset as its spec describes, validating and cleaning it with a row ledger, and splitting it.

Behaviour a user meets in the ledger and the quarantine, decided here once:

- **Duplicate ids.** Every row that shares its id with another row is quarantined with reason
  ``duplicate_id``, exact copies included. Which of two rows is right cannot be told from the data, and
  "keep the first" would make the result depend on file order; the ledger shows the count, so the upstream
  fault (an overlapping export, a re-sent file) is seen and fixed rather than papered over.
- **Binary target.** 0 and 1 in any numeric spelling ("1", "1.0"), booleans, and the words true/false,
  yes/no (any case, trimmed) are read as 1/0. Any other value quarantines the row: ``binary:<target>`` for
  another number (e.g. 2), ``coerce:<target>`` for other text.
- **Missing values.** pandas' default markers ("", "NA", "NaN", "null", "None", "N/A", ...) are missing in
  every column; text columns are trimmed and a blank value is missing. Missing categories are fine for the
  model (they map to the unknown id); a numeric feature or the target still missing after the rules is not.
- **Row numbers.** ``_source_row`` is the data-row number within its file: 1 is the first row under the
  header (line 2 of a CSV with one header line, unless a quoted value spans lines).
- **Order of work.** validation (all failures of a row at once) → the spec's rules in the order written →
  model-readiness. A row leaves at the first stage that rejects it, so a later stage never sees it.
"""

from __future__ import annotations

import codecs
import difflib
import glob
import hashlib
import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pandera.pandas as pa
import pyarrow as pyarrow_lib
import pyarrow.parquet as pq
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.ledger import Ledger
from entivec.schemas.spec import (
    Condition,
    DropMissingRule,
    FillRule,
    RangeRule,
    Spec,
    SpecError,
    SplitSpec,
    resolve_source,
)
from entivec.schemas.tables import (
    build_schema,
    category_columns,
    failure_reason,
    parse_times,
    reason_sort_key,
    required_columns,
)
from entivec.schemas.vocabulary import category_strings
from entivec.settings import project_home

SOURCE_FILE = "_source_file"
SOURCE_ROW = "_source_row"
BOOKKEEPING = (SOURCE_FILE, SOURCE_ROW)
REASONS = "_reasons"
QUARANTINE_STEM = "quarantine"

_CSV_SUFFIXES = {".csv", ".tsv", ".txt"}
_COMPRESSION_SUFFIXES = {".gz", ".bz2", ".zip", ".xz", ".zst"}
_PARQUET_SUFFIXES = {".parquet", ".pq", ".parq"}
_EXAMPLES = 5  # row references quoted in a ledger step or an error message


class InputError(Exception):
    """Input that stops the run: the message names the file and, where it applies, the column and rows.

    ``quarantine`` and ``ledger`` are set when cleaning got as far as rejecting every row, so a caller can
    still write the quarantine for people to open.
    """

    def __init__(self, message: str, *, quarantine: pd.DataFrame | None = None, ledger: Ledger | None = None):
        super().__init__(message)
        self.quarantine = quarantine
        self.ledger = ledger


# --- spec checks that need more than the spec model itself ------------------------------------------------------


def check_spec_fits(spec: Spec, spec_path: str | Path | None = None) -> None:
    """Rules and split settings that the spec model accepts but that cannot work; raises SpecError.

    Run before any data is read so a wrong spec fails in a second, not after a long read.
    """
    where = f"spec file {spec_path}: " if spec_path is not None else "spec: "
    numeric = set(spec.numeric_names) | {spec.target.column}
    text = set(category_columns(spec))
    for i, rule in enumerate(spec.rules):
        key = f"rules[{i}]"
        if isinstance(rule, RangeRule) and rule.column in text:
            raise SpecError(
                f"{where}{key} is a range rule on {rule.column!r}, a text column; range rules compare numbers "
                f"(numeric columns, the target, a numeric time column)"
            )
        if isinstance(rule, FillRule):
            if rule.column == spec.id_column:
                raise SpecError(f"{where}{key} fills the id column {rule.column!r}; ids are never made up")
            if rule.column in numeric:
                value = _number_or_none(rule.value)
                if value is None:
                    raise SpecError(
                        f"{where}key '{key}.value' is {rule.value!r}, but column {rule.column!r} holds numbers"
                    )
                if rule.column == spec.target.column and spec.target.task == "binary" and value not in (0.0, 1.0):
                    raise SpecError(
                        f"{where}key '{key}.value' is {rule.value!r}, but the binary target "
                        f"{rule.column!r} takes only 0 or 1"
                    )
            if rule.when is not None and rule.when.equals is not None and rule.when.column in numeric:
                if _number_or_none(rule.when.equals) is None:
                    raise SpecError(
                        f"{where}key '{key}.when.equals' is {rule.when.equals!r}, but column "
                        f"{rule.when.column!r} holds numbers"
                    )
    if spec.split.method == "time" and spec.split.cutoff is not None:
        cutoff = spec.split.cutoff
        if _number_or_none(cutoff) is None and _timestamp_or_none(cutoff) is None:
            raise SpecError(
                f"{where}key 'split.cutoff' is {cutoff!r}, which reads neither as a time (e.g. 2014-07-01, "
                f"2014-07-01T00:00:00Z) nor as a number (e.g. 2008 for a year column)"
            )


def _number_or_none(value: Any) -> float | None:
    if isinstance(value, bool):
        return float(value)
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _timestamp_or_none(value: Any) -> pd.Timestamp | None:
    try:
        stamp = pd.Timestamp(str(value))
    except (ValueError, TypeError, OverflowError):
        return None
    if pd.isna(stamp):
        return None
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


# --- reading ----------------------------------------------------------------------------------------------------


def _match_files(pattern: str) -> list[Path]:
    if glob.has_magic(pattern):
        matched = sorted(p for p in glob.glob(pattern, recursive=True) if Path(p).is_file())
        if not matched:
            raise InputError(
                f"source {pattern}: no file matches this glob (spec key source.path){_folder_hint(pattern)}"
            )
        return [Path(p) for p in matched]
    path = Path(pattern)
    if path.is_dir():
        raise InputError(
            f"source {path}: is a folder, not a file (spec key source.path); use a glob such as {path / '*.csv'}"
        )
    if not path.exists():
        raise InputError(f"source file {path}: not found (spec key source.path){_folder_hint(pattern)}")
    return [path]


def _folder_hint(pattern: str) -> str:
    # The nearest existing folder above the pattern and a few of its entries: the usual fault is a typo.
    folder = Path(pattern).parent
    while glob.has_magic(str(folder)) and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir():
        return f"; the folder {folder} does not exist"
    entries = sorted(p.name for p in folder.iterdir())
    close = difflib.get_close_matches(Path(pattern).name, entries, n=1)
    hint = f"; did you mean {folder / close[0]}?" if close else ""
    shown = ", ".join(entries[:10]) + (", ..." if len(entries) > 10 else "")
    return f"{hint}; {folder} holds: {shown or '(nothing)'}"


def _file_format(path: Path, declared: str) -> str:
    if declared != "auto":
        return declared
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in _PARQUET_SUFFIXES:
        return "parquet"
    if suffixes and suffixes[-1] in _COMPRESSION_SUFFIXES:
        suffixes = suffixes[:-1]
    if suffixes and suffixes[-1] in _CSV_SUFFIXES:
        return "csv"
    raise InputError(
        f"{path}: cannot tell the format from the suffix {''.join(path.suffixes) or '(none)'!r}; supported are "
        f".csv, .tsv, .txt (also compressed: .gz, .bz2, .zip, .xz, .zst), .parquet, .pq and .parq, "
        f"or set source.format (csv or parquet) in the spec"
    )


def _python_encoding(spec: Spec, path: Path) -> str:
    declared = spec.source.encoding
    try:
        name = codecs.lookup(declared).name
    except LookupError:
        raise InputError(
            f"{path}: source.encoding {declared!r} is not an encoding Python knows (e.g. utf-8, latin-1, cp1252)"
        ) from None
    # A byte-order mark is common in files saved by spreadsheet programs; utf-8-sig reads files with and without.
    return "utf-8-sig" if name == "utf-8" else declared


def _decode_error(path: Path, declared: str, exc: UnicodeDecodeError) -> InputError:
    where = f"byte 0x{exc.object[exc.start : exc.start + 1].hex()}"
    if path.suffix.lower() not in _COMPRESSION_SUFFIXES:
        # The parser's position is inside one chunk; find the line in the whole file (error path only).
        data = path.read_bytes()
        try:
            data.decode(declared)
        except UnicodeDecodeError as whole:
            line = data.count(b"\n", 0, whole.start) + 1
            where = f"byte 0x{data[whole.start : whole.start + 1].hex()} on line {line}"
    return InputError(
        f"{path}: cannot be decoded as {declared} ({where}); the spec declares source.encoding: {declared}. "
        f"Set source.encoding to the file's real encoding (for example latin-1 or cp1252)"
    )


def _csv_options(spec: Spec, path: Path) -> dict[str, Any]:
    return {"encoding": _python_encoding(spec, path), "sep": spec.source.delimiter}


def _read_header(path: Path, fmt: str, spec: Spec) -> list[str]:
    try:
        if fmt == "parquet":
            names = [str(c) for c in pq.read_schema(path).names]
            first_line = names
        else:
            options = _csv_options(spec, path)
            names = [str(c) for c in pd.read_csv(path, nrows=0, **options).columns]
            # pandas renames a repeated header ("weight", "weight.1"); the first line read as data shows it.
            first_line = pd.read_csv(path, nrows=1, header=None, dtype=str, **options).iloc[0].tolist()
    except Exception as exc:
        raise _read_error(path, fmt, spec, exc) from None
    written = [c for c in first_line if isinstance(c, str)]
    repeated = sorted({c for c in written if written.count(c) > 1})
    if repeated:
        raise InputError(f"{path}: column name(s) {', '.join(map(repr, repeated))} appear more than once in the header")
    return names


def _read_body(path: Path, fmt: str, spec: Spec, header: list[str]) -> pd.DataFrame:
    try:
        if fmt == "parquet":
            return pd.read_parquet(path)
        text = {c: str for c in category_columns(spec) if c in header}
        return pd.read_csv(path, dtype=text, low_memory=False, **_csv_options(spec, path))
    except Exception as exc:
        raise _read_error(path, fmt, spec, exc) from None


def _read_error(path: Path, fmt: str, spec: Spec, exc: Exception) -> Exception:
    """Turn a reader's exception into an InputError, except I/O trouble that a retry may cure."""
    if isinstance(exc, InputError):
        return exc
    if isinstance(exc, UnicodeDecodeError):
        return _decode_error(path, spec.source.encoding, exc)
    if isinstance(exc, (FileNotFoundError, PermissionError, IsADirectoryError)):
        return InputError(f"{path}: cannot be opened ({exc.strerror or exc})")
    if isinstance(exc, OSError) and exc.errno is not None:
        return exc  # a real I/O fault (network share, disk): left as OSError so the task's retries apply
    if isinstance(exc, pd.errors.EmptyDataError):
        return InputError(f"{path}: the file is empty (no header, no rows)")
    if isinstance(exc, pd.errors.ParserError):
        return InputError(
            f"{path}: not readable as CSV with delimiter {spec.source.delimiter!r} (spec key source.delimiter): {exc}"
        )
    if fmt == "parquet" and isinstance(exc, (pyarrow_lib.ArrowException, OSError, ValueError)):
        return InputError(f"{path}: not a readable Parquet file ({exc})")
    if isinstance(exc, (ValueError, OSError)):
        return InputError(f"{path}: cannot be read as {fmt} ({exc})")
    return exc


def _check_columns(path: Path, columns: list[str], spec: Spec, fmt: str) -> None:
    clash = [c for c in (*BOOKKEEPING, REASONS) if c in columns]
    if clash:
        raise InputError(f"{path}: column {clash[0]!r} is a name entivec reserves for bookkeeping; rename it")
    required = required_columns(spec)
    missing = [c for c in required if c not in columns]
    if not missing:
        return
    parts = [f"column {c!r} (spec key {required[c]}) is missing{_close_hint(c, columns)}" for c in missing]
    shown = ", ".join(repr(c) for c in columns[:30]) + (", ..." if len(columns) > 30 else "")
    message = f"{path}: {'; '.join(parts)}. The file has {len(columns)} column(s): {shown}"
    if fmt == "csv" and len(columns) == 1:
        for other in (";", "\t", "|", ","):
            if other != spec.source.delimiter and other in columns[0]:
                message += f". The header looks {other!r}-delimited: set source.delimiter in the spec"
                break
    raise InputError(message)


def _close_hint(name: str, columns: list[str]) -> str:
    by_case = {c.lower(): c for c in columns}
    if name.lower() in by_case:
        return f" (did you mean {by_case[name.lower()]!r}?)"
    close = difflib.get_close_matches(name, columns, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def read_source(spec: Spec, spec_path: str | Path) -> tuple[pd.DataFrame, list[str]]:
    """Read the spec's source (one file or a glob) into one frame with ``_source_file`` and ``_source_row``.

    Category and id columns are read as text. Files of a glob are read in sorted path order and must have the
    same columns (in any order; the first file's order is kept). Every file-level fault raises InputError.
    """
    check_spec_fits(spec, spec_path)
    pattern = resolve_source(spec, spec_path)
    paths = _match_files(pattern)
    formats = [_file_format(p, spec.source.format) for p in paths]
    # Headers first: a missing column or a mismatched file fails before any large read.
    headers = [_read_header(p, f, spec) for p, f in zip(paths, formats, strict=True)]
    for path, fmt, header in zip(paths, formats, headers, strict=True):
        _check_columns(path, header, spec, fmt)
    first = headers[0]
    for path, header in zip(paths[1:], headers[1:], strict=True):
        if set(header) != set(first):
            lacks = [c for c in first if c not in header]
            extra = [c for c in header if c not in first]
            raise InputError(
                f"files of source {pattern} do not have the same columns: {path} "
                + (f"lacks {lacks} " if lacks else "")
                + ("and " if lacks and extra else "")
                + (f"has extra {extra} " if extra else "")
                + f"compared with {paths[0]}"
            )
    frames = []
    for path, fmt, header in zip(paths, formats, headers, strict=True):
        body = _read_body(path, fmt, spec, header)
        if len(body) == 0:
            raise InputError(f"{path}: has a header but no data rows")
        body = body[first]
        body[SOURCE_FILE] = str(path)
        body[SOURCE_ROW] = np.arange(1, len(body) + 1, dtype=np.int64)
        frames.append(body)
    raw = frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)
    return raw.reset_index(drop=True), [str(p) for p in paths]


# --- validation and cleaning ------------------------------------------------------------------------------------


@dataclass
class CleanResult:
    frame: pd.DataFrame  # model-ready rows, typed, index reset; bookkeeping columns kept
    quarantine: pd.DataFrame  # rows as read, with _source_file, _source_row and _reasons
    ledger: Ledger


@dataclass
class _Rejections:
    """Reasons per rejected row (rows are positions in the raw frame), in the order they were found."""

    positions: list[np.ndarray] = field(default_factory=list)
    reasons: list[str] = field(default_factory=list)

    def add(self, positions: np.ndarray | pd.Index, reason: str) -> None:
        self.positions.append(np.asarray(positions, dtype=np.int64))
        self.reasons.append(reason)

    def table(self, raw: pd.DataFrame) -> pd.DataFrame:
        if not self.positions:
            return raw.iloc[0:0].assign(**{REASONS: pd.Series([], dtype="string")}).reset_index(drop=True)
        sizes = [len(p) for p in self.positions]
        pairs = pd.DataFrame(
            {"row": np.concatenate(self.positions), "reason": np.repeat(np.array(self.reasons, dtype=object), sizes)}
        )
        pairs = pairs.drop_duplicates().sort_values("row", kind="stable")  # stable: reasons keep their order
        rows, first = np.unique(pairs["row"].to_numpy(), return_index=True)
        # Join each row's reasons with whole-array string sums, one pass per reason rank (a row has few).
        rank = pairs.groupby("row", sort=False).cumcount().to_numpy()
        reasons = pairs["reason"].to_numpy(dtype=object)
        joined = reasons[first].copy()
        slot = np.searchsorted(rows, pairs["row"].to_numpy())
        for r in range(1, int(rank.max()) + 1):
            at = rank == r
            joined[slot[at]] = joined[slot[at]] + ";" + reasons[at]
        out = raw.iloc[rows].copy()
        out[REASONS] = pd.array(joined, dtype="string")
        return out.reset_index(drop=True)


def _examples(raw: pd.DataFrame, positions: np.ndarray | pd.Index) -> str:
    picked = np.asarray(positions, dtype=np.int64)[:_EXAMPLES]
    if len(picked) == 0:
        return ""
    files = raw[SOURCE_FILE].to_numpy()[picked]
    rows = raw[SOURCE_ROW].to_numpy()[picked]
    refs = [f"{Path(str(f)).name} row {int(r)}" for f, r in zip(files, rows, strict=True)]
    more = ", ..." if len(positions) > _EXAMPLES else ""
    return "e.g. " + ", ".join(refs) + more


def _with_bookkeeping(raw: pd.DataFrame) -> pd.DataFrame:
    # A frame built in memory (tests, the apply path) gets the same bookkeeping a file read would give it.
    raw = raw.reset_index(drop=True)
    if SOURCE_FILE not in raw.columns:
        raw = raw.assign(**{SOURCE_FILE: "<frame>"})
    if SOURCE_ROW not in raw.columns:
        raw = raw.assign(**{SOURCE_ROW: np.arange(1, len(raw) + 1, dtype=np.int64)})
    return raw


def _require_columns(raw: pd.DataFrame, spec: Spec, files: list[str]) -> None:
    columns = [str(c) for c in raw.columns if c not in BOOKKEEPING]
    required = required_columns(spec)
    missing = [c for c in required if c not in raw.columns]
    if missing:
        where = ", ".join(files) if files else "the input table"
        parts = [f"column {c!r} (spec key {required[c]}) is missing{_close_hint(c, columns)}" for c in missing]
        raise InputError(f"{where}: {'; '.join(parts)}. The table has columns: {', '.join(map(repr, columns))}")


_DETAIL = {
    "coerce": "value cannot be read as a number",
    "null": "missing, and the spec does not allow it here",
    "binary": "binary target is neither 0 nor 1 (read as 1/0: numbers 1/0, true/false, yes/no)",
    "range": "outside the column's declared min/max (inclusive)",
    "infinite": "infinite value",
    "time": "cannot be read as a time",
    "duplicate_id": "id shared with another row: every row of a shared id is quarantined",
}


def _validate(raw: pd.DataFrame, spec: Spec, ledger: Ledger, rejected: _Rejections) -> pd.DataFrame:
    """Validate lazily with the spec's pandera schema; return the typed rows that pass (index = raw position)."""
    schema = build_schema(spec)
    names = list(schema.columns)
    work = raw[[*names, *BOOKKEEPING]].copy()
    try:
        return schema.validate(work, lazy=True)
    except pa.errors.SchemaErrors as exc:
        cases = exc.failure_cases
    found: list[pd.DataFrame] = []
    coerce = cases[cases["check"].astype(str).str.startswith("coerce_dtype") & cases["index"].notna()]
    if len(coerce):
        # A column with values that are not numbers was checked uncoerced, so its other results mean nothing.
        # Keep the coercion failures, blank those cells, and validate again for everything else.
        coerce = coerce.assign(row=coerce["index"].astype(np.int64))
        for column, group in coerce.groupby("column", sort=False):
            work.loc[group["row"].to_numpy(), column] = np.nan
        found.append(pd.DataFrame({"row": coerce["row"], "reason": "coerce:" + coerce["column"].astype(str)}))
        try:
            schema.validate(work, lazy=True)
            cases = cases.iloc[0:0]
        except pa.errors.SchemaErrors as exc:
            cases = exc.failure_cases
    unplaced = cases[cases["index"].isna()]
    if len(unplaced):
        first = unplaced.iloc[0]
        raise InputError(
            f"{', '.join(ledger.files) or 'input table'}: column {first['column']!r} could not be validated "
            f"(check {first['check']}): {first['failure_case']}"
        )
    if len(cases):
        reasons = [failure_reason(c, k) for c, k in zip(cases["column"], cases["check"].astype(str), strict=True)]
        found.append(pd.DataFrame({"row": cases["index"].astype(np.int64).to_numpy(), "reason": reasons}))
    if not found:
        raise InputError(f"{', '.join(ledger.files) or 'input table'}: validation failed without a row to blame")
    pairs = pd.concat(found, ignore_index=True).drop_duplicates()
    if len(coerce):
        # A cell blanked because it was not a number is reported once, as coerce, not again as missing.
        blanked = pd.MultiIndex.from_arrays([coerce["row"], "null:" + coerce["column"].astype(str)])
        pairs = pairs[~pd.MultiIndex.from_arrays([pairs["row"], pairs["reason"]]).isin(blanked)]
    order = sorted(pairs["reason"].unique(), key=lambda r: reason_sort_key(r, names))
    for reason in order:
        rows = np.sort(pairs.loc[pairs["reason"] == reason, "row"].to_numpy())
        kind = reason.partition(":")[0]
        detail = _DETAIL.get(kind, "failed a schema check")
        ledger.record(reason, "quarantine", len(rows), f"{detail}; {_examples(raw, rows)}")
        rejected.add(rows, reason)
    failed = np.unique(pairs["row"].to_numpy())
    ledger.rows_quarantined += len(failed)
    return schema.validate(work.drop(index=failed))  # every failing row is gone: this pass only types the rest


# Each rule takes the typed rows still in play and returns the rows that go on, the rows it removed under one
# reason, and the ledger steps it took. validate_and_clean checks the counts, so a rule cannot lose a row.
@dataclass
class _RuleOutcome:
    frame: pd.DataFrame
    removed: pd.Index
    reason: str = ""
    steps: list[tuple[str, str, int, str]] = field(default_factory=list)


def _numeric_series(frame: pd.DataFrame, column: str, key: str) -> pd.Series:
    values = frame[column]
    if not pd.api.types.is_numeric_dtype(values.dtype) or pd.api.types.is_bool_dtype(values.dtype):
        raise SpecError(f"spec: {key} compares numbers, but column {column!r} holds {values.dtype} values")
    return values


def _apply_range(frame: pd.DataFrame, rule: RangeRule, i: int, raw: pd.DataFrame) -> _RuleOutcome:
    key = f"rules[{i}]"
    values = _numeric_series(frame, rule.column, key)
    keep = values.notna()
    if rule.min is not None:
        keep &= values >= rule.min if rule.inclusive else values > rule.min
    if rule.max is not None:
        keep &= values <= rule.max if rule.inclusive else values < rule.max
    removed = frame.index[~keep.to_numpy()]
    reason = f"{key}:range:{rule.column}"
    low = "" if rule.min is None else f"{rule.min:g} {'<=' if rule.inclusive else '<'} "
    high = "" if rule.max is None else f" {'<=' if rule.inclusive else '<'} {rule.max:g}"
    detail = f"keep {low}{rule.column}{high}; missing values fail; {_examples(raw, removed)}".rstrip("; ")
    return _RuleOutcome(frame[keep.to_numpy()], removed, reason, [(reason, "quarantine", len(removed), detail)])


def _describe(cond: Condition) -> str:
    if cond.is_missing is not None:
        return f"{cond.column} is {'missing' if cond.is_missing else 'present'}"
    return f"{cond.column} == {cond.equals!r}"


def _condition_mask(frame: pd.DataFrame, cond: Condition, key: str) -> np.ndarray:
    values = frame[cond.column]
    if cond.is_missing is not None:
        missing = values.isna().to_numpy()
        return missing if cond.is_missing else ~missing
    target = cond.equals
    dtype = values.dtype
    if isinstance(dtype, pd.DatetimeTZDtype):
        stamp = _timestamp_or_none(target)
        if stamp is None:
            raise SpecError(f"spec: key '{key}.when.equals' {target!r} is not a time, but {cond.column!r} holds times")
        return (values == stamp).fillna(False).to_numpy(dtype=bool)
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype):
        number = _number_or_none(target)
        if number is None:
            raise SpecError(f"spec: key '{key}.when.equals' is {target!r}, but column {cond.column!r} holds numbers")
        return (values == number).fillna(False).to_numpy(dtype=bool)
    text = category_strings(values)
    if isinstance(target, bool):
        # YAML reads an unquoted yes/no/true/false as a boolean; match the words a text column would hold.
        words = ["true", "yes", "1"] if target else ["false", "no", "0"]
        return text.str.lower().isin(words).fillna(False).to_numpy(dtype=bool)
    if isinstance(target, float) and target.is_integer():
        target = int(target)
    return (text == str(target)).fillna(False).to_numpy(dtype=bool)


def _apply_fill(frame: pd.DataFrame, rule: FillRule, i: int, raw: pd.DataFrame) -> _RuleOutcome:
    key = f"rules[{i}]"
    values = frame[rule.column]
    missing = values.isna().to_numpy()
    inside = _condition_mask(frame, rule.when, key) if rule.when is not None else np.ones(len(frame), bool)
    to_fill = missing & inside
    outside = missing & ~inside
    numeric = pd.api.types.is_numeric_dtype(values.dtype) and not pd.api.types.is_bool_dtype(values.dtype)
    if numeric:
        number = _number_or_none(rule.value)
        if number is None:
            raise SpecError(f"spec: key '{key}.value' is {rule.value!r}, but column {rule.column!r} holds numbers")
        fill_value: Any = number
    else:
        fill_value = str(rule.value).strip()
    out = frame.copy()
    if to_fill.any():
        out.loc[out.index[to_fill], rule.column] = fill_value
    where = f" where {_describe(rule.when)}" if rule.when is not None else ""
    step = f"{key}:fill:{rule.column}"
    steps = [(step, "fill", int(to_fill.sum()), f"missing {rule.column} set to {fill_value!r}{where}")]
    if rule.when is None:
        return _RuleOutcome(out, frame.index[[]], "", steps)
    unfilled = f"{key}:unfilled:{rule.column}"
    left = frame.index[outside]
    if rule.otherwise == "quarantine":
        detail = f"missing {rule.column} where not ({_describe(rule.when)}); {_examples(raw, left)}".rstrip("; ")
        steps.append((unfilled, "quarantine", len(left), detail))
        return _RuleOutcome(out[~outside], left, unfilled, steps)
    detail = (
        f"{len(left)} missing {rule.column} value(s) where not ({_describe(rule.when)}) left as they are; "
        f"{_examples(raw, left)}"
    ).rstrip("; ")
    steps.append((unfilled, "report", len(left), detail))
    return _RuleOutcome(out, frame.index[[]], "", steps)


def _apply_drop_missing(frame: pd.DataFrame, rule: DropMissingRule, i: int, raw: pd.DataFrame) -> _RuleOutcome:
    missing = frame[rule.column].isna().to_numpy()
    removed = frame.index[missing]
    reason = f"rules[{i}]:drop_missing:{rule.column}"
    detail = f"{rule.column} is missing; {_examples(raw, removed)}".rstrip("; ")
    return _RuleOutcome(frame[~missing], removed, reason, [(reason, "quarantine", len(removed), detail)])


RULES: dict[str, Callable[[pd.DataFrame, Any, int, pd.DataFrame], _RuleOutcome]] = {
    "range": _apply_range,
    "fill": _apply_fill,
    "drop_missing": _apply_drop_missing,
}


def _model_ready(
    frame: pd.DataFrame, spec: Spec, raw: pd.DataFrame, ledger: Ledger, rejected: _Rejections
) -> pd.DataFrame:
    """Quarantine rows a model cannot take: a numeric feature or the target (or split time) still missing.

    A categorical feature may be missing (it maps to the unknown id) unless the spec declares it not nullable.
    """
    strict_text = [c.name for c in (*spec.columns.embed, *spec.columns.onehot) if not c.nullable]
    needed = [*strict_text, *spec.numeric_names, spec.target.column]
    if spec.split.method == "time" and spec.split.time_column and spec.split.time_column not in needed:
        needed.append(spec.split.time_column)
    failing = np.zeros(len(frame), dtype=bool)
    for column in needed:
        missing = frame[column].isna().to_numpy()
        reason = f"missing_after_rules:{column}"
        rows = frame.index[missing]
        if missing.any():
            detail = f"{column} still missing after the rules; {_examples(raw, rows)}"
            ledger.record(reason, "quarantine", len(rows), detail)
            rejected.add(rows, reason)
        failing |= missing
    ledger.rows_quarantined += int(failing.sum())
    return frame[~failing]


def validate_and_clean(raw: pd.DataFrame, spec: Spec, files: list[str] | None = None) -> CleanResult:
    """Validate, apply the spec's rules in order, and check model-readiness; every row is used or quarantined.

    Raises InputError when a required column is missing or when no row survives (the exception then carries
    the quarantine and the ledger), SpecError when a rule cannot apply to its column, and LedgerMismatch if
    the counts do not add up.
    """
    check_spec_fits(spec)
    raw = _with_bookkeeping(raw)
    files = list(files) if files is not None else [str(f) for f in pd.unique(raw[SOURCE_FILE])]
    _require_columns(raw, spec, files)
    ledger = Ledger(rows_in=len(raw), files=files)
    rejected = _Rejections()
    typed = _validate(raw, spec, ledger, rejected)
    for i, rule in enumerate(spec.rules):
        outcome = RULES[rule.kind](typed, rule, i, raw)
        for step, action, rows, detail in outcome.steps:
            ledger.record(step, action, rows, detail)
        if len(outcome.removed):
            rejected.add(outcome.removed, outcome.reason)
        ledger.rows_quarantined += len(outcome.removed)
        typed = outcome.frame
    typed = _model_ready(typed, spec, raw, ledger, rejected)
    time_column = spec.split.time_column
    if (
        time_column
        and time_column not in spec.feature_columns
        and time_column
        not in (
            spec.id_column,
            spec.target.column,
        )
    ):
        typed = typed.assign(**{time_column: parse_times(typed[time_column])})
    frame = typed.reset_index(drop=True)
    quarantine = rejected.table(raw)
    ledger.check(len(frame), len(quarantine))
    if len(frame) == 0:
        top = sorted(ledger.quarantined_by_reason().items(), key=lambda kv: -kv[1])[:5]
        summary = ", ".join(f"{reason} ({rows})" for reason, rows in top)
        raise InputError(
            f"{', '.join(files)}: all {ledger.rows_in} row(s) were quarantined; most common reasons: {summary}",
            quarantine=quarantine,
            ledger=ledger,
        )
    return CleanResult(frame=frame, quarantine=quarantine, ledger=ledger)


# --- split ------------------------------------------------------------------------------------------------------


def _cutoff_for(times: pd.Series, split: SplitSpec) -> Any:
    cutoff = split.cutoff
    if pd.api.types.is_numeric_dtype(times.dtype):
        number = _number_or_none(cutoff)
        if number is None:
            raise SpecError(
                f"spec: key 'split.cutoff' is {cutoff!r}, but time column {split.time_column!r} holds numbers "
                f"(e.g. {times.dropna().iloc[0] if times.notna().any() else 'none'}); give a number"
            )
        return number
    stamp = _timestamp_or_none(cutoff)
    if stamp is None:
        raise SpecError(f"spec: key 'split.cutoff' is {cutoff!r}, which cannot be read as a time")
    return stamp


def split_rows(frame: pd.DataFrame, split: SplitSpec) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(train, test). Both keep the input's row order; index reset.

    - ``random``: a permutation drawn from ``numpy.random.default_rng(seed)`` picks ceil(n * test_fraction)
      test rows (the rounding scikit-learn's train_test_split uses), at least 1 and at most n - 1.
      The same rows in the same order with the same seed always give the same split.
    - ``time``: rows whose time is at or after ``cutoff`` are test. Text times are read as UTC (see
      ``parse_times``); a numeric time column (e.g. a year) is compared as numbers.
    """
    n = len(frame)
    if split.method == "random":
        if n < 2:
            raise InputError(f"cannot split {n} row(s) into a train and a test part; at least 2 are needed")
        n_test = min(max(math.ceil(n * split.test_fraction), 1), n - 1)
        order = np.random.default_rng(split.seed).permutation(n)
        is_test = np.zeros(n, dtype=bool)
        is_test[order[:n_test]] = True
    else:
        column = split.time_column
        assert column is not None  # the spec model requires it for a time split
        if column not in frame.columns:
            raise InputError(f"time split: column {column!r} (spec key split.time_column) is not in the table")
        times = parse_times(frame[column])
        cutoff = _cutoff_for(times, split)
        unreadable = times.isna().to_numpy()
        if unreadable.any():
            raise InputError(
                f"time split: {int(unreadable.sum())} row(s) of column {column!r} cannot be read as a time; "
                f"{_examples(_with_bookkeeping(frame), np.flatnonzero(unreadable))}"
            )
        is_test = (times >= cutoff).to_numpy(dtype=bool)
        if is_test.all() or not is_test.any():
            side = "train" if is_test.all() else "test"
            raise InputError(
                f"time split on column {column!r} at cutoff {split.cutoff!r} (spec key split.cutoff) leaves the "
                f"{side} part empty: times run from {times.min()} to {times.max()}"
            )
    train = frame[~is_test].reset_index(drop=True)
    test = frame[is_test].reset_index(drop=True)
    return train, test


# --- fingerprint and quarantine files ---------------------------------------------------------------------------


def _row_hashes(frame: pd.DataFrame, columns: list) -> np.ndarray:
    if not len(frame):
        return np.zeros(0, dtype="<u8")
    return pd.util.hash_pandas_object(frame[columns], index=False, categorize=True).to_numpy().astype("<u8")


def _digest(columns: list[str], hashes: np.ndarray) -> str:
    h = hashlib.sha256()
    h.update(json.dumps(columns).encode())
    h.update(hashes.tobytes())
    return h.hexdigest()


def _file_bytes_sha256(path: str) -> str | None:
    h = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                h.update(block)
    except OSError:
        return None
    return h.hexdigest()


def data_fingerprint(raw: pd.DataFrame, files: list[str]) -> dict:
    """What identifies the data a vector set was trained on.

    ``sha256`` hashes the values as read (``pandas.util.hash_pandas_object`` per row, columns in sorted name
    order, the column names included) and nothing else: the same rows in the same order give the same hash
    wherever the files live and whatever their column order. Per file: rows, the same content hash over its
    rows, and the SHA-256 of its bytes (None when the file cannot be opened now). Row hashing is pandas'
    own, so compare fingerprints made with the same pandas major version (recorded here).
    """
    names = sorted((c for c in raw.columns if c not in BOOKKEEPING), key=str)
    columns = [str(c) for c in names]
    hashes = _row_hashes(raw, names)
    per_file = []
    if SOURCE_FILE in raw.columns:
        sources = raw[SOURCE_FILE].astype(str).to_numpy()
        for name in files:
            mask = sources == str(name)
            per_file.append(
                {
                    "name": Path(name).name,
                    "rows": int(mask.sum()),
                    "sha256": _digest(columns, hashes[mask]),
                    "bytes_sha256": _file_bytes_sha256(name),
                }
            )
    return {
        "sha256": _digest(columns, hashes),
        "rows": int(len(raw)),
        "columns": [str(c) for c in raw.columns if c not in BOOKKEEPING],
        "files": per_file,
        "method": "sha256 over pandas.util.hash_pandas_object rows, columns in sorted order",
        "pandas": pd.__version__,
    }


def write_quarantine(quarantine: pd.DataFrame, folder: str | Path) -> Path:
    """Write the quarantine as Parquet (returned) and CSV beside it, for people to open."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    # Reasons and the row's origin first: the columns a person opening the file looks for.
    front = [c for c in (REASONS, *BOOKKEEPING) if c in quarantine.columns]
    out = quarantine[front + [c for c in quarantine.columns if c not in front]].copy()
    for column in out.columns:
        if out[column].dtype == object:
            # Values as read may mix numbers and text in one column; Parquet needs one type per column.
            out[column] = out[column].astype("string")
    parquet_path = folder / f"{QUARANTINE_STEM}.parquet"
    out.to_parquet(parquet_path, index=False)
    out.to_csv(folder / f"{QUARANTINE_STEM}.csv", index=False)
    return parquet_path


# --- Prefect tasks ----------------------------------------------------------------------------------------------


def retry_on_io_only(task: Any, task_run: Any, state: Any) -> bool:
    """Retry a failed read only for I/O trouble; bad input (InputError, SpecError) fails at once."""
    exc = state.result(raise_on_failure=False)
    return isinstance(exc, OSError) and not isinstance(exc, (InputError, SpecError))


# Cache keys would hash whole frames; every step here is cheap to redo, so nothing is cached.
@task(name="ingest", retries=2, retry_delay_seconds=2, retry_condition_fn=retry_on_io_only, cache_policy=NO_CACHE)
def ingest(spec: Spec, spec_path: str | Path) -> tuple[pd.DataFrame, list[str]]:
    """read_source as a task; an OSError with an errno (I/O trouble) is retried, bad input is not."""
    return read_source(spec, spec_path)


def clean_or_keep_quarantine(
    raw: pd.DataFrame, spec: Spec, files: list[str] | None, keep_in: str | Path
) -> CleanResult:
    """validate_and_clean; when it rejects every row, the quarantine is written under ``keep_in`` first.

    The run stops either way, but the people who must fix the data get the file of rejected rows and their
    reasons. The InputError raised names the folder it was written to.
    """
    try:
        return validate_and_clean(raw, spec, files)
    except InputError as error:
        if error.quarantine is None:
            raise
        stamp = pd.Timestamp.now(tz="UTC").strftime("%Y%m%dT%H%M%S%fZ")
        folder = Path(keep_in) / f"{spec.name}-{stamp}"
        path = write_quarantine(error.quarantine, folder)
        raise InputError(
            f"{error}; the quarantine ({len(error.quarantine)} row(s) with their reasons) is in {path}",
            quarantine=error.quarantine,
            ledger=error.ledger,
        ) from error


@task(name="clean", cache_policy=NO_CACHE)
def clean(raw: pd.DataFrame, spec: Spec, files: list[str] | None = None) -> CleanResult:
    """validate_and_clean as a task; a quarantine of every row is kept under the project folder."""
    return clean_or_keep_quarantine(raw, spec, files, project_home() / "quarantine")


@task(name="split", cache_policy=NO_CACHE)
def split(frame: pd.DataFrame, split: SplitSpec) -> tuple[pd.DataFrame, pd.DataFrame]:
    """split_rows as a task."""
    return split_rows(frame, split)
