"""Validating and cleaning what was read: pandera schema, the spec's rules in order, a row ledger, a quarantine.

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

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pandera.pandas as pa
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
)
from entivec.schemas.tables import (
    build_schema,
    failure_reason,
    parse_times,
    reason_sort_key,
    required_columns,
)
from entivec.schemas.vocabulary import category_strings
from entivec.settings import project_home
from entivec.tasks.ingest.notes import imputed, whitespace_merges, with_row_ids
from entivec.tasks.ingest.read import (
    BOOKKEEPING,
    EXAMPLES,
    QUARANTINE_STEM,
    RAGGED,
    RAW_LINE,
    REASONS,
    SOURCE_FILE,
    SOURCE_ROW,
    InputError,
    check_spec_fits,
    close_hint,
    number_or_none,
    timestamp_or_none,
)

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


def examples(raw: pd.DataFrame, positions: np.ndarray | pd.Index) -> str:
    picked = np.asarray(positions, dtype=np.int64)[:EXAMPLES]
    if len(picked) == 0:
        return ""
    files = raw[SOURCE_FILE].to_numpy()[picked]
    rows = raw[SOURCE_ROW].to_numpy()[picked]
    refs = [f"{Path(str(f)).name} row {int(r)}" for f, r in zip(files, rows, strict=True)]
    more = ", ..." if len(positions) > EXAMPLES else ""
    return "e.g. " + ", ".join(refs) + more


def with_bookkeeping(raw: pd.DataFrame) -> pd.DataFrame:
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
        parts = [f"column {c!r} (spec key {required[c]}) is missing{close_hint(c, columns)}" for c in missing]
        raise InputError(f"{where}: {'; '.join(parts)}. The table has columns: {', '.join(map(repr, columns))}")


_DETAIL = {
    "coerce": "value cannot be read as a number",
    "null": "missing, and the spec does not allow it here",
    "binary": "binary target is neither 0 nor 1 (read as 1/0: numbers 1/0, true/false, yes/no)",
    "range": "outside the column's declared min/max (inclusive)",
    "infinite": "infinite value",
    "time": "cannot be read as a time",
    "integer": "not a whole number >= 0, but the column is declared a count (integer: true)",
    "domain": "outside the domain of the column's transform (log needs > 0, log1p needs > -1)",
    "duplicate_id": "id shared with another row: every row of a shared id is quarantined",
}


def _validate(
    raw: pd.DataFrame, spec: Spec, ledger: Ledger, rejected: _Rejections, skip: np.ndarray | None = None,
    duplicates: np.ndarray | None = None,
) -> pd.DataFrame:
    """Validate lazily with the spec's pandera schema; return the typed rows that pass (index = raw position).

    Rows at the positions ``skip`` (already quarantined) are left out. With ``duplicates`` (positions of rows
    whose id another row of the whole table shares, found outside this frame) the schema's own uniqueness
    check is replaced by that list."""
    schema = build_schema(spec, unique_ids=duplicates is None)
    names = list(schema.columns)
    work = raw[[*names, SOURCE_FILE, SOURCE_ROW]]
    work = (work.drop(index=raw.index[skip]) if skip is not None and len(skip) else work).copy()
    found: list[pd.DataFrame] = []
    if duplicates is not None and len(duplicates):
        found.append(pd.DataFrame({"row": np.asarray(duplicates, dtype=np.int64), "reason": "duplicate_id"}))
    try:
        typed = schema.validate(work, lazy=True)
        if not found:
            return typed
        cases = pd.DataFrame({"index": pd.Series([], dtype=float), "column": [], "check": [], "failure_case": []})
    except pa.errors.SchemaErrors as exc:
        cases = exc.failure_cases
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
        ledger.record(reason, "quarantine", len(rows), f"{detail}; {examples(raw, rows)}")
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
    detail = f"keep {low}{rule.column}{high}; missing values fail; {examples(raw, removed)}".rstrip("; ")
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
        stamp = timestamp_or_none(target)
        if stamp is None:
            raise SpecError(f"spec: key '{key}.when.equals' {target!r} is not a time, but {cond.column!r} holds times")
        return (values == stamp).fillna(False).to_numpy(dtype=bool)
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype):
        number = number_or_none(target)
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
        number = number_or_none(rule.value)
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
        detail = f"missing {rule.column} where not ({_describe(rule.when)}); {examples(raw, left)}".rstrip("; ")
        steps.append((unfilled, "quarantine", len(left), detail))
        return _RuleOutcome(out[~outside], left, unfilled, steps)
    detail = (
        f"{len(left)} missing {rule.column} value(s) where not ({_describe(rule.when)}) left as they are; "
        f"{examples(raw, left)}"
    ).rstrip("; ")
    steps.append((unfilled, "report", len(left), detail))
    return _RuleOutcome(out, frame.index[[]], "", steps)


def _apply_drop_missing(frame: pd.DataFrame, rule: DropMissingRule, i: int, raw: pd.DataFrame) -> _RuleOutcome:
    missing = frame[rule.column].isna().to_numpy()
    removed = frame.index[missing]
    reason = f"rules[{i}]:drop_missing:{rule.column}"
    detail = f"{rule.column} is missing; {examples(raw, removed)}".rstrip("; ")
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
    numeric = [c.name for c in spec.columns.numeric if c.impute == "none"]
    needed = [*strict_text, *numeric, spec.target.column]
    if spec.split.method == "time" and spec.split.time_column and spec.split.time_column not in needed:
        needed.append(spec.split.time_column)
    failing = np.zeros(len(frame), dtype=bool)
    for column in needed:
        missing = frame[column].isna().to_numpy()
        reason = f"missing_after_rules:{column}"
        rows = frame.index[missing]
        if missing.any():
            detail = f"{column} still missing after the rules; {examples(raw, rows)}"
            ledger.record(reason, "quarantine", len(rows), detail)
            rejected.add(rows, reason)
        failing |= missing
    ledger.rows_quarantined += int(failing.sum())
    return frame[~failing]


def _ragged(raw: pd.DataFrame, ledger: Ledger, rejected: _Rejections) -> np.ndarray:
    """Positions of CSV lines with the wrong number of fields (see csvfile.csv_batches), quarantined here."""
    if RAW_LINE not in raw.columns:
        return np.zeros(0, dtype=np.int64)
    positions = np.flatnonzero(raw[RAW_LINE].notna().to_numpy())
    if len(positions):
        ledger.record(
            RAGGED, "quarantine", len(positions),
            f"a line with too few or too many fields (RFC 4180: every line has the header's field count); the "
            f"line is kept in {RAW_LINE}; {examples(raw, positions)}",
        )
        rejected.add(positions, RAGGED)
        ledger.rows_quarantined += len(positions)
    return positions


def validate_and_clean(
    raw: pd.DataFrame, spec: Spec, files: list[str] | None = None, *, duplicates: np.ndarray | None = None,
    first_row_id: int = 1, allow_empty: bool = False,
) -> CleanResult:
    """Validate, apply the spec's rules in order, and check model-readiness; every row is used or quarantined.

    Raises InputError when a required column is missing or when no row survives (the exception then carries
    the quarantine and the ledger), SpecError when a rule cannot apply to its column, and LedgerMismatch if
    the counts do not add up.

    For one batch of a streamed table: ``duplicates`` are the positions (in this batch) of rows whose id is
    shared anywhere in the table, ``first_row_id`` numbers the rows when the spec has no id column, and
    ``allow_empty`` lets a batch lose every row (the stream checks the whole table at its end).
    """
    check_spec_fits(spec)
    raw = with_bookkeeping(raw)
    files = list(files) if files is not None else [str(f) for f in pd.unique(raw[SOURCE_FILE])]
    ledger = Ledger(rows_in=len(raw), files=files)
    raw = with_row_ids(raw, spec, ledger, first=first_row_id)
    _require_columns(raw, spec, files)
    rejected = _Rejections()
    ragged = _ragged(raw, ledger, rejected)
    whitespace_merges(raw, spec, ledger, ragged)
    typed = _validate(raw, spec, ledger, rejected, skip=ragged, duplicates=duplicates)
    for i, rule in enumerate(spec.rules):
        outcome = RULES[rule.kind](typed, rule, i, raw)
        for step, action, rows, detail in outcome.steps:
            ledger.record(step, action, rows, detail)
        if len(outcome.removed):
            rejected.add(outcome.removed, outcome.reason)
        ledger.rows_quarantined += len(outcome.removed)
        typed = outcome.frame
    typed = _model_ready(typed, spec, raw, ledger, rejected)
    imputed(typed, spec, ledger)
    time_column = spec.split.time_column
    if (
        time_column
        and time_column not in spec.feature_columns
        and time_column
        not in (
            spec.id_name,
            spec.target.column,
        )
    ):
        typed = typed.assign(**{time_column: parse_times(typed[time_column])})
    frame = typed.reset_index(drop=True)
    quarantine = rejected.table(raw)
    ledger.check(len(frame), len(quarantine))
    if len(frame) == 0 and not allow_empty:
        top = sorted(ledger.quarantined_by_reason().items(), key=lambda kv: -kv[1])[:5]
        summary = ", ".join(f"{reason} ({rows})" for reason, rows in top)
        raise InputError(
            f"{', '.join(files)}: all {ledger.rows_in} row(s) were quarantined; most common reasons: {summary}",
            quarantine=quarantine,
            ledger=ledger,
        )
    return CleanResult(frame=frame, quarantine=quarantine, ledger=ledger)



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



def kept_folder(name: str, keep_in: str | Path) -> Path:
    """Where the quarantine of a run that stops is kept: ``keep_in``/``NAME-STAMP``."""
    return Path(keep_in) / f"{name}-{pd.Timestamp.now(tz='UTC').strftime('%Y%m%dT%H%M%S%fZ')}"


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
        path = write_quarantine(error.quarantine, kept_folder(spec.name, keep_in))
        raise InputError(
            f"{error}; the quarantine ({len(error.quarantine)} row(s) with their reasons) is in {path}",
            quarantine=error.quarantine,
            ledger=error.ledger,
        ) from error


@task(name="clean", cache_policy=NO_CACHE)
def clean(raw: pd.DataFrame, spec: Spec, files: list[str] | None = None) -> CleanResult:
    """validate_and_clean as a task; a quarantine of every row is kept under the project folder."""
    return clean_or_keep_quarantine(raw, spec, files, project_home() / "quarantine")
