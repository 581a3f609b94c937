"""The pandera schema of an input table, built from its spec, and the reason names its failures map to."""

from __future__ import annotations

import warnings
from collections.abc import Iterable

import numpy as np
import pandas as pd
import pandera.pandas as pa

from entivec.schemas.spec import DropMissingRule, FillRule, RangeRule, Spec
from entivec.schemas.vocabulary import category_strings

# Spellings a binary target may use besides the numbers 0 and 1 (any numeric spelling: "1", "1.0", 1, True).
# Matched after trimming and lower-casing. Deliberately short: "y"/"n", "t"/"f", "positive" and the like are
# not guessed, so a column that is not really binary fails loudly instead of being half-understood.
BINARY_LABELS: dict[str, str] = {"true": "1", "yes": "1", "false": "0", "no": "0"}

# Names of the checks this module attaches; each failure maps to a reason "<kind>:<column>" (see failure_reason).
CHECK_RANGE = "range"
CHECK_BINARY = "binary"
CHECK_FINITE = "finite"
CHECK_TIME = "time"
CHECK_INTEGER = "integer"
CHECK_DOMAIN = "domain"

# Order in which the reasons of one row are listed: type problems first, then values, then the table-wide one.
REASON_ORDER = ("coerce", "null", "binary", "range", "integer", "domain", "infinite", "time", "duplicate_id")


# --- parsers: what a cell may look like before it is typed -----------------------------------------------------


def _object_with_nan(values: pd.Series) -> pd.Series:
    # Nullable string dtypes hold pd.NA, which float coercion treats as a bad value rather than a missing one.
    out = values.astype(object)
    return out.where(values.notna(), np.nan)


def number_ready(values: pd.Series) -> pd.Series:
    """A column about to be coerced to float: numbers and booleans untouched, text with NaN for missing."""
    if pd.api.types.is_numeric_dtype(values.dtype) or pd.api.types.is_bool_dtype(values.dtype):
        return values
    return _object_with_nan(values)


def binary_labels(values: pd.Series) -> pd.Series:
    """Map the words of BINARY_LABELS to "1"/"0"; numbers pass through; anything else is left to fail coercion."""
    if pd.api.types.is_bool_dtype(values.dtype):
        return values.astype("float64").where(values.notna(), np.nan)
    if pd.api.types.is_numeric_dtype(values.dtype):
        return values
    words = values.astype("string").str.strip().str.lower()
    return _object_with_nan(words.replace(BINARY_LABELS))


def parse_times(values: pd.Series) -> pd.Series:
    """A time column as comparable values: numbers stay numbers (e.g. a year), text becomes UTC timestamps.

    Naive timestamps are read as UTC so that a column and a cutoff written without a zone compare as written.
    The format is inferred from the data first (fast, one format); values that do not fit it are parsed one by
    one as a fallback, so a file mixing "2013-01-01" and "2013-01-01T10:00:00Z" still reads. Unparsable or
    missing values come back as NaT.
    """
    dtype = values.dtype
    if isinstance(dtype, pd.DatetimeTZDtype):
        return values.dt.tz_convert("UTC")
    if pd.api.types.is_datetime64_dtype(dtype):
        return values.dt.tz_localize("UTC")
    if pd.api.types.is_bool_dtype(dtype):
        return pd.Series(pd.NaT, index=values.index, dtype="datetime64[ns, UTC]")
    if pd.api.types.is_numeric_dtype(dtype):
        return values.astype("float64")
    text = _object_with_nan(values.astype("string").str.strip().replace("", pd.NA))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # "could not infer format": the fallback below handles it
        parsed = pd.to_datetime(text, errors="coerce", utc=True)
        failed = parsed.isna() & text.notna()
        if failed.any():
            parsed = parsed.copy()
            parsed[failed] = pd.to_datetime(text[failed], errors="coerce", utc=True, format="mixed")
    return parsed


# --- which columns play which part -----------------------------------------------------------------------------


def null_handled_by_rules(spec: Spec) -> set[str]:
    """Columns whose missing values a cleaning rule deals with.

    For these, nulls are let through validation so that the rule acts on them and owns their count in the
    ledger (a fill can fill them, a range or drop_missing rule quarantines them under its own name). Whatever
    is still missing after the rules is caught by the model-readiness check.
    """
    return {r.column for r in spec.rules if isinstance(r, (RangeRule, FillRule, DropMissingRule))}


def required_columns(spec: Spec) -> dict[str, str]:
    """Every column the data must have, with the spec key that asks for it."""
    keys: dict[str, str] = {spec.id_column: "id_column"} if spec.id_column is not None else {}
    keys[spec.target.column] = "target.column"
    for role, cols in (
        ("columns.embed", spec.columns.embed),
        ("columns.onehot", spec.columns.onehot),
        ("columns.numeric", spec.columns.numeric),
    ):
        for i, col in enumerate(cols):
            keys.setdefault(col.name, f"{role}[{i}]")
    if spec.split.time_column:
        keys.setdefault(spec.split.time_column, "split.time_column")
    return keys


def category_columns(spec: Spec) -> list[str]:
    """Columns read as text, never as numbers ("00123" stays "00123"): the id and the categorical features."""
    return [spec.id_name, *spec.embed_names, *spec.onehot_names]


# --- the schema -----------------------------------------------------------------------------------------------


def _finite() -> pa.Check:
    return pa.Check(lambda s: pd.Series(np.isfinite(s.to_numpy(dtype="float64")), index=s.index), name=CHECK_FINITE)


def _declared_range(low: float | None, high: float | None) -> pa.Check:
    def inside(s: pd.Series) -> pd.Series:
        ok = pd.Series(True, index=s.index)
        if low is not None:
            ok &= s >= low
        if high is not None:
            ok &= s <= high
        return ok

    return pa.Check(inside, name=CHECK_RANGE)


def _whole_and_not_negative() -> pa.Check:
    # A count: 0, 1, 2, ... (a whole number stored as 3.0 is still a whole number).
    def whole(s: pd.Series) -> pd.Series:
        values = s.to_numpy(dtype="float64")
        with np.errstate(invalid="ignore"):
            return pd.Series((values >= 0) & (np.floor(values) == values), index=s.index)

    return pa.Check(whole, name=CHECK_INTEGER)


# Where each numeric input transform is defined: log needs x > 0, log1p needs x > -1.
TRANSFORM_LOWER_BOUND = {"log": 0.0, "log1p": -1.0}


def _in_transform_domain(transform: str) -> pa.Check:
    bound = TRANSFORM_LOWER_BOUND[transform]
    return pa.Check(lambda s: s > bound, name=CHECK_DOMAIN)


def _parses_as_time() -> pa.Check:
    return pa.Check(lambda s: parse_times(s).notna(), name=CHECK_TIME)


def build_schema(spec: Spec, unique_ids: bool = True) -> pa.DataFrameSchema:
    """The pandera schema of the spec's table.

    - id column: text, never missing, unique (every row sharing an id fails, see ``report_duplicates="all"``).
    - embed / onehot columns: text (trimmed, blank = missing); missing allowed per their ``nullable``.
    - numeric columns: coerced to float, finite, inside their declared ``min``/``max`` (inclusive), whole and
      not negative when declared ``integer``, inside the domain of their ``transform``; missing allowed per their
      ``nullable`` or when they are imputed (``impute: median``).
    - target: coerced to float and finite; a binary target must be 0 or 1 (the words of BINARY_LABELS are
      read as 1/0 first). Never missing.
    - time column of the split: present, never missing, readable as a time (see ``parse_times``).

    A column that a cleaning rule deals with (see ``null_handled_by_rules``) may be missing at this stage:
    the rule, and after it the model-readiness check, decide. Columns the spec does not name are allowed.
    ``unique_ids=False`` leaves id uniqueness out, for a table checked batch by batch whose duplicate ids are
    found across all batches by other means.
    """
    deferred = null_handled_by_rules(spec)
    time_column = spec.split.time_column
    # The split's time column may also be a declared column (e.g. a numeric "year"); it then gets one more check.
    extra: dict[str, list[pa.Check]] = {time_column: [_parses_as_time()]} if time_column else {}
    text = [pa.Parser(category_strings)]
    columns: dict[str, pa.Column] = {
        spec.id_name: pa.Column(
            pd.StringDtype(),
            parsers=text,
            checks=extra.get(spec.id_name, []),
            coerce=True,
            nullable=False,
            unique=unique_ids,
            report_duplicates="all",
        )
    }
    for col in [*spec.columns.embed, *spec.columns.onehot]:
        columns[col.name] = pa.Column(
            pd.StringDtype(),
            parsers=text,
            checks=extra.get(col.name, []),
            coerce=True,
            nullable=col.nullable or col.name in deferred,
        )
    for col in spec.columns.numeric:
        checks = [_finite(), *extra.get(col.name, [])]
        if col.min is not None or col.max is not None:
            checks.append(_declared_range(col.min, col.max))
        if col.integer:
            checks.append(_whole_and_not_negative())
        if col.transform != "none":
            checks.append(_in_transform_domain(col.transform))
        columns[col.name] = pa.Column(
            "float64",
            parsers=[pa.Parser(number_ready)],
            checks=checks,
            coerce=True,
            nullable=col.nullable or col.impute != "none" or col.name in deferred,
        )
    target = spec.target
    target_checks = [_finite(), *extra.get(target.column, [])]
    if target.task == "binary":
        target_checks.append(pa.Check(lambda s: s.isin([0.0, 1.0]), name=CHECK_BINARY))
    columns[target.column] = pa.Column(
        "float64",
        parsers=[pa.Parser(binary_labels if target.task == "binary" else number_ready)],
        checks=target_checks,
        coerce=True,
        nullable=target.column in deferred,
    )
    if time_column and time_column not in columns:
        columns[time_column] = pa.Column(checks=extra[time_column], nullable=time_column in deferred)
    return pa.DataFrameSchema(columns, strict=False, name=spec.name)


def failure_reason(column: str | None, check: str) -> str:
    """The quarantine reason for one pandera failure case: ``coerce:carat``, ``null:temperature``, ``duplicate_id``."""
    if check.startswith("coerce_dtype"):
        return f"coerce:{column}"
    if check == "not_nullable":
        return f"null:{column}"
    if check == "field_uniqueness":
        return "duplicate_id"
    if check == CHECK_RANGE:
        return f"range:{column}"
    if check == CHECK_BINARY:
        return f"binary:{column}"
    if check == CHECK_FINITE:
        return f"infinite:{column}"
    if check == CHECK_TIME:
        return f"time:{column}"
    if check == CHECK_INTEGER:
        return f"integer:{column}"
    if check == CHECK_DOMAIN:
        return f"domain:{column}"
    # Never drop a failure for want of a name: an unforeseen check keeps its own.
    return f"check:{check}:{column}"


def reason_sort_key(reason: str, column_order: Iterable[str]) -> tuple[int, int, str]:
    """Stable order for reasons: by column as the spec lists them, then by kind (REASON_ORDER)."""
    kind, _, column = reason.partition(":")
    order = {name: i for i, name in enumerate(column_order)}
    kind_rank = REASON_ORDER.index(kind) if kind in REASON_ORDER else len(REASON_ORDER)
    return (order.get(column, len(order)), kind_rank, reason)
