"""Category -> vector lookup, the one unknown-category rule, and the registered pyfunc model built on them.

Everything in entivec that turns categories into vectors (the scikit-learn transformer, the batch apply
job and the served lookup model) goes through :class:`ColumnLookup`, so the three give bit-identical
vectors for the same registered version and follow the same rule for categories the vocabulary lacks.

The unknown-category rule (parameter ``unknown``) decides what a value gets when its vocabulary id is 0,
that is when it is unseen in training, was too rare to get its own id (below ``min_count``), or is
missing (null, NaN, empty or blank text):

- ``"unknown_row"`` (default): the trained unknown row (row 0 of the column's matrix). Training fed it the
  rare and missing rows, so it is the vector the network itself would use.
- ``"zeros"``: a zero vector, for downstream models that should see "no information".
- ``"mean"``: the frequency-weighted mean of the known vectors (ids 1..n, weights = the vocabulary's
  training counts); the unweighted mean when every count is 0; zeros when no category is known.
- ``"error"``: refuse the input with :class:`UnknownCategoryError`, naming the column, how many values
  and a few of them. Missing values count as unknown here too.

The shrink rule (``tasks/apply/shrink.py``, off by default) is applied here, once per column, before the
unknown-category rule, so all three consumers apply it identically.

Category column types (:func:`category_type_problem`): text always fits; integer, float or boolean input
fits only when the vocabulary holds categories spelled that way (an integer column meeting a vocabulary of
text would silently turn every row unknown); nested, binary, temporal and decimal columns never fit.

Categories are read by the vocabulary's type: when every known category is an integer code in its plain
spelling (``1045``, no leading zeros), a value spelled as a whole number with a decimal point (``1045.0``, what a
spreadsheet or pandas makes of an integer column with gaps) or a sign (``+1045``) or leading zeros means that
code, in text and float columns alike. A vocabulary of codes with leading zeros (postcodes, ``00712``) is text:
its values must match as they are spelled.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import torch

from entivec.schemas.vector_set import VectorSet, component_names
from entivec.schemas.vocabulary import UNKNOWN_ID, Vocabulary, category_strings
from entivec.tasks.apply.shrink import shrunk_matrix

UNKNOWN_RULES = ("unknown_row", "zeros", "mean", "error")
DEFAULT_UNKNOWN = "unknown_row"
_EXAMPLES = 5
UNSEEN_KEPT = 10_000


class UnknownCategoryError(ValueError):
    """Values outside the vocabulary met the ``unknown="error"`` rule; the message names column and values."""


class CategoryTypeError(TypeError):
    """A category column whose type cannot spell the vocabulary's categories; the message says why."""


def check_unknown_rule(rule: str) -> str:
    if rule not in UNKNOWN_RULES:
        raise ValueError(f"unknown-category rule {rule!r} is not one of {', '.join(UNKNOWN_RULES)}")
    return rule


def rule_matrix(vocabulary: Vocabulary, matrix: np.ndarray, unknown: str) -> np.ndarray:
    """The column's matrix (float32, one row per id) with row 0 set as the unknown-category rule says."""
    check_unknown_rule(unknown)
    table = np.array(matrix, dtype=np.float32, order="C", copy=True)
    if unknown == "zeros":
        table[UNKNOWN_ID] = 0.0
    elif unknown == "mean":
        known = np.asarray(matrix[1:], dtype=np.float64)
        weights = np.asarray(vocabulary.counts[1:], dtype=np.float64)
        if len(known) == 0:
            table[UNKNOWN_ID] = 0.0
        elif weights.sum() > 0:
            table[UNKNOWN_ID] = (weights @ known) / weights.sum()
        else:
            table[UNKNOWN_ID] = known.mean(axis=0)
    return table


# --- the type a category column may have --------------------------------------------------------------------

_INTEGER = re.compile(r"^[+-]?\d+$")
_PLAIN_INTEGER = re.compile(r"^-?(0|[1-9]\d*)$")
_WHOLE_NUMBER = re.compile(r"^[+-]?\d+(\.0*)?$")
_FLOAT = re.compile(r"^[+-]?(\d+\.\d*|\.\d+|\d+(\.\d*)?[eE][+-]?\d+|nan|inf)$", re.IGNORECASE)


def pandas_kind(dtype) -> str:
    """'text', 'integer', 'float', 'boolean', 'null' or 'other' for a pandas dtype."""
    if isinstance(dtype, pd.CategoricalDtype):
        return pandas_kind(dtype.categories.dtype)
    if isinstance(dtype, pd.ArrowDtype):
        return arrow_kind(dtype.pyarrow_dtype)
    if pd.api.types.is_bool_dtype(dtype):
        return "boolean"
    if pd.api.types.is_integer_dtype(dtype):
        return "integer"
    if pd.api.types.is_float_dtype(dtype):
        return "float"
    if pd.api.types.is_string_dtype(dtype) or pd.api.types.is_object_dtype(dtype):
        return "text"
    return "other"


def arrow_kind(arrow_type: pa.DataType) -> str:
    """'text', 'integer', 'float', 'boolean', 'null' or 'other' for an Arrow type."""
    if pa.types.is_dictionary(arrow_type):
        return arrow_kind(arrow_type.value_type)
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type) or pa.types.is_string_view(arrow_type):
        return "text"
    if pa.types.is_integer(arrow_type):
        return "integer"
    if pa.types.is_floating(arrow_type):
        return "float"
    if pa.types.is_boolean(arrow_type):
        return "boolean"
    if pa.types.is_null(arrow_type):
        return "null"
    return "other"


def category_type_problem(kind: str, type_name: str, vocabulary: Vocabulary) -> str | None:
    """Why a column of this kind cannot hold the vocabulary's categories, or None when it can."""
    known = vocabulary.categories[1:]
    sample = f" (e.g. {', '.join(repr(c) for c in known[:3])})" if known else ""
    if kind in ("text", "null") or not known:
        return None
    if kind == "other":
        return (
            f"has type {type_name}, which cannot hold categories; category columns hold text, integers or "
            "booleans (cast the column to text if its values really are categories)"
        )
    spelled = {
        "integer": any(_INTEGER.match(c) for c in known),
        "float": any(_FLOAT.match(c) for c in known) or integer_codes(known),
        "boolean": any(c in ("True", "False") for c in known),
    }[kind]
    if spelled:
        return None
    return (
        f"has type {type_name}, but the vocabulary holds no {kind} categories{sample}: every value would be "
        "unknown. Read the column as text (or fix which column is meant)"
    )


def integer_codes(categories: Sequence[str]) -> bool:
    """Whether a vocabulary's known categories are all integer codes in their plain spelling."""
    return bool(categories) and all(_PLAIN_INTEGER.match(c) for c in categories)


def as_integer_code(values: pd.Series) -> pd.Series:
    """Whole numbers spelled otherwise (``1045.0``, ``+1045``, ``01045``) in plain integer spelling; others NA."""
    spelled = category_strings(values)
    whole = spelled.str.fullmatch(_WHOLE_NUMBER.pattern).fillna(False).to_numpy(dtype=bool)
    out = pd.Series(pd.NA, index=spelled.index, dtype="string")
    if whole.any():
        out[whole] = [str(int(v.split(".")[0])) for v in spelled[whole]]
    return out


# --- one column's lookup ------------------------------------------------------------------------------------


def _text_arrow(arrow_type: pa.DataType) -> bool:
    return pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type)


class ColumnLookup:
    """Vocabulary ids and vectors for one column under one unknown-category rule.

    ``ids`` gives exactly what ``encode`` gives (``vocabulary.encode``, the one spelling of categories, with
    whole numbers read as the codes of an integer vocabulary), but works on the distinct values where it can:
    a dictionary-encoded Arrow array or a pandas categorical is mapped through its (small) dictionary, and
    text is first matched whole-array against the vocabulary as it is spelled, with only the values that miss
    (unseen, missing, or spelled otherwise) going through ``encode``. ``vectors`` gathers rows of the rule's
    matrix, component-major.
    """

    def __init__(self, column: str, vocabulary: Vocabulary, matrix: np.ndarray, unknown: str = DEFAULT_UNKNOWN,
                 *, confidence: pd.DataFrame | None = None, shrink: dict | None = None):
        self.column = column
        self.vocabulary = vocabulary
        self.unknown = check_unknown_rule(unknown)
        self.table = rule_matrix(vocabulary, shrunk_matrix(vocabulary, matrix, confidence, shrink), unknown)
        self.dimension = int(self.table.shape[1])
        self.names = component_names(column, self.dimension)
        # component-major copy: gathering along axis 1 writes each component contiguously (pandas' and
        # Parquet's layout), so no transpose pass follows the gather
        self._table_by_component = torch.from_numpy(np.ascontiguousarray(self.table.T))
        known = vocabulary.categories[1:]
        self._known_objects = pd.Index(np.array(known, dtype=object), dtype=object)
        self._known_arrow = pa.array(known, type=pa.string())
        self._last_dictionary: tuple[pa.Array, np.ndarray] | None = None
        self.integer_codes = integer_codes(known)

    def encode(self, values: pd.Series) -> np.ndarray:
        """``vocabulary.encode``, reading whole numbers spelled otherwise as the codes of an integer vocabulary."""
        ids = self.vocabulary.encode(values)
        if self.integer_codes:
            miss = ids == UNKNOWN_ID
            if miss.any():
                again = self.vocabulary.encode(as_integer_code(pd.Series(values).iloc[np.flatnonzero(miss)]))
                ids[miss] = again
        return ids

    # ids ---------------------------------------------------------------------------------------------------

    def ids_of_distinct(self, values) -> np.ndarray:
        """``vocabulary.encode`` for a small set of distinct values (a dictionary, categories, uniques)."""
        if isinstance(values, pa.Array) and (_text_arrow(values.type) or pa.types.is_string_view(values.type)):
            # consecutive chunks of one Parquet row group often share their dictionary: map it once
            last = self._last_dictionary
            if last is not None and last[0].equals(values):
                return last[1]
            distinct = self._ids_arrow(values)  # hits first: only misses pay for the spelling
            self._last_dictionary = (values, distinct)
            return distinct
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            values = values.to_pandas(types_mapper=_exact_pandas_type)
        return self.encode(pd.Series(values))

    def ids(self, values) -> np.ndarray:
        """Vocabulary ids (int64) of a pandas Series/Index, NumPy array or Arrow array; unknown -> 0."""
        if isinstance(values, pa.ChunkedArray):
            parts = [self.ids(chunk) for chunk in values.chunks]
            return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)
        if isinstance(values, pa.Array):
            return self._ids_arrow(values)
        series = values if isinstance(values, pd.Series) else pd.Series(values)
        dtype = series.dtype
        if isinstance(dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy()
            return _through(self.ids_of_distinct(series.cat.categories), codes)
        if isinstance(dtype, pd.ArrowDtype) or (isinstance(dtype, pd.StringDtype) and dtype.storage == "pyarrow"):
            return self.ids(pa.array(series.array))  # the Arrow data itself, no copy
        if pd.api.types.is_object_dtype(dtype) or isinstance(dtype, pd.StringDtype):
            raw = series.to_numpy(dtype=object)
            if pd.api.types.infer_dtype(raw, skipna=True) in ("string", "empty"):
                # all text: Arrow's hash lookup beats Python objects' (bytes or numbers stay on the path below,
                # whose spelling of them differs from Arrow's)
                return self._ids_arrow(pa.array(raw, type=pa.string(), from_pandas=True))
            positions = self._known_objects.get_indexer(raw)
            return self._resolve_misses(positions, lambda mask: pd.Series(raw[mask], dtype=object))
        if pd.api.types.is_integer_dtype(dtype) or pd.api.types.is_bool_dtype(dtype):
            codes, uniques = pd.factorize(series, use_na_sentinel=True)
            return _through(self.ids_of_distinct(pd.Series(uniques)), codes)
        return self.encode(series)  # floats and anything else: the plain path, exact by definition

    def _ids_arrow(self, array: pa.Array) -> np.ndarray:
        if pa.types.is_dictionary(array.type):
            return _through(self.ids_of_distinct(array.dictionary), _codes(array))
        if pa.types.is_string_view(array.type):
            array = array.cast(pa.string())
        if _text_arrow(array.type):
            known = self._known_arrow if pa.types.is_string(array.type) else self._known_arrow.cast(array.type)
            found = pc.index_in(array, value_set=known)
            positions = pc.fill_null(found, -1).to_numpy(zero_copy_only=False)
            return self._resolve_misses(positions, lambda mask: array.filter(pa.array(mask)).to_pandas())
        return self._ids_arrow(pc.dictionary_encode(array))

    def _resolve_misses(self, positions: np.ndarray, missed_values) -> np.ndarray:
        """Exact hits are already ids - 1; the rest go through the vocabulary's own spelling."""
        ids = positions.astype(np.int64) + 1
        miss = positions < 0
        if miss.any():
            ids[miss] = self.encode(missed_values(miss))
        return ids

    # vectors -----------------------------------------------------------------------------------------------

    def vectors(self, ids: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Rows of the rule's matrix for ``ids``, as a (dimension, n) float32 array (component-major).

        ``out``, a C-contiguous float32 array of that shape, is filled instead of a new one: reusing it
        across chunks spares the page faults of fresh memory, a large part of the cost at this speed.
        """
        return _gather(self._table_by_component, ids, out)

    def vectors_and_report(
        self, values, out: np.ndarray | None = None, source: str = ""
    ) -> tuple[np.ndarray, ColumnReport]:
        """A chunk's vectors (as ``vectors``) and the report of what met the unknown rule.

        Under the ``error`` rule an unknown value is refused before any vector is gathered. Dictionary-
        encoded values never get per-row ids: the dictionary's vectors are gathered once and the rows index
        them, which gives the very same rows.
        """
        if isinstance(values, pa.ChunkedArray):
            values = values.combine_chunks()
        if isinstance(values, pa.Array) and pa.types.is_dictionary(values.type):
            distinct = self.ids_of_distinct(values.dictionary)
            codes = _codes(values)
            report = _dictionary_report(self, values.dictionary, distinct, codes)
            self.refuse_unknown(report, source)
            lut = torch.from_numpy(np.append(np.asarray(distinct, dtype=np.int64), UNKNOWN_ID))
            by_entry = torch.index_select(self._table_by_component, 1, lut)  # null code = last entry: unknown
            return _gather(by_entry, codes, out), report
        ids = self.ids(values)
        report = column_report(self, values, ids)
        self.refuse_unknown(report, source)
        return self.vectors(ids, out), report

    def check_known(self, ids: np.ndarray, values, source: str = "") -> None:
        """Under the ``error`` rule, refuse values whose id is unknown, naming a few of them."""
        if self.unknown == "error" and (ids == UNKNOWN_ID).any():
            self.refuse_unknown(column_report(self, values, ids), source)

    def refuse_unknown(self, report: ColumnReport, source: str = "") -> None:
        """Under the ``error`` rule, raise :class:`UnknownCategoryError` if the report counts unknown rows."""
        if self.unknown != "error" or report.unknown == 0:
            return
        shown = [repr(v) for v in report.unseen.index[:_EXAMPLES]]
        if report.missing:
            shown.append(f"{report.missing} missing")
        where = f"{source}: " if source else ""
        raise UnknownCategoryError(
            f"{where}column {self.column!r}: {report.unknown} of {report.rows} value(s) are not in the "
            f"vocabulary ({', '.join(shown)}) and the unknown-category rule is 'error'"
        )


def _codes(array: pa.DictionaryArray) -> np.ndarray:
    """A dictionary array's indices as int32/int64, with nulls as one past the last entry."""
    indices = array.indices
    if indices.null_count:
        indices = pc.fill_null(indices, len(array.dictionary))
    codes = indices.to_numpy(zero_copy_only=False)
    return codes if codes.dtype in (np.int32, np.int64) else codes.astype(np.int32)


def _gather(table: torch.Tensor, index: np.ndarray, out: np.ndarray | None) -> np.ndarray:
    """Columns ``index`` of a (dimension, entries) table, as a (dimension, n) float32 array."""
    if index.dtype not in (np.int32, np.int64):
        index = index.astype(np.int64)
    with warnings.catch_warnings():  # Arrow's buffers are read-only; the gather only reads them
        warnings.simplefilter("ignore", UserWarning)
        positions = torch.from_numpy(np.ascontiguousarray(index))
    if out is None:
        return torch.index_select(table, 1, positions).numpy()
    torch.index_select(table, 1, positions, out=torch.from_numpy(out))
    return out


def _exact_pandas_type(arrow_type: pa.DataType):
    """Keep integers integers (and text text) when Arrow values become pandas, so the spelling stays '3'."""
    if pa.types.is_integer(arrow_type):
        return pd.Int64Dtype()
    if pa.types.is_boolean(arrow_type):
        return pd.BooleanDtype()
    if _text_arrow(arrow_type) or pa.types.is_string_view(arrow_type):
        return pd.StringDtype()
    return None


def _through(distinct_ids: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """Ids of every row from ids of the distinct values; a missing value's code (-1, or one past the last
    distinct value) maps to the unknown id."""
    lut = np.append(np.asarray(distinct_ids, dtype=np.int64), UNKNOWN_ID)  # serves code -1 and code len
    return lut[np.asarray(codes)]


@dataclass
class ColumnReport:
    """What one column's lookup met: rows, rows given the unknown id, and why (missing or unseen category).

    ``unseen`` counts each unseen (or too rare) category as it is spelled, most frequent first. When a batch
    job meets more than ``UNSEEN_KEPT`` distinct unseen categories it keeps the most frequent ones, so the
    counts of the tail are a lower bound; ``unknown``, ``missing`` and ``rows`` are always exact.
    """

    column: str
    rows: int = 0
    unknown: int = 0
    missing: int = 0
    unseen: pd.Series = field(default_factory=lambda: pd.Series(dtype="int64"))

    @property
    def unknown_share(self) -> float:
        """Share of rows the unknown-category rule applied to (unseen, too rare or missing)."""
        return self.unknown / self.rows if self.rows else 0.0

    def top_unseen(self, k: int = _EXAMPLES) -> list[tuple[str, int]]:
        return [(str(c), int(n)) for c, n in self.unseen.iloc[:k].items()]

    def add(self, other: ColumnReport) -> ColumnReport:
        unseen = self.unseen.add(other.unseen, fill_value=0) if len(self.unseen) else other.unseen
        unseen = _most_frequent_first(unseen.astype("int64"))
        if len(unseen) > 2 * UNSEEN_KEPT:
            unseen = unseen.iloc[:UNSEEN_KEPT]
        return ColumnReport(
            self.column, self.rows + other.rows, self.unknown + other.unknown, self.missing + other.missing, unseen
        )

    def as_dict(self) -> dict:
        return {
            "column": self.column,
            "rows": self.rows,
            "unknown": self.unknown,
            "missing": self.missing,
            "unseen": self.unknown - self.missing,
            "unknown_share": self.unknown_share,
            "top_unseen": self.top_unseen(),
        }


def _most_frequent_first(counts: pd.Series) -> pd.Series:
    return counts.sort_index(kind="stable").sort_values(ascending=False, kind="stable")


def column_report(lookup: ColumnLookup, values, ids: np.ndarray) -> ColumnReport:
    """Count what went to the unknown id: missing values, and each unseen category as it is spelled."""
    unknown = ids == UNKNOWN_ID
    count = int(unknown.sum())
    if count == 0:
        return ColumnReport(lookup.column, len(ids))
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if isinstance(values, pa.Array) and pa.types.is_dictionary(values.type):
        distinct = lookup.ids_of_distinct(values.dictionary)
        return _dictionary_report(lookup, values.dictionary, distinct, _codes(values))
    if isinstance(values, pa.Array):
        subset = values.filter(pa.array(unknown)).to_pandas(types_mapper=_exact_pandas_type)
    else:
        subset = (values if isinstance(values, pd.Series) else pd.Series(values))[unknown]
    spelled = category_strings(pd.Series(subset))
    unseen = spelled.dropna().value_counts()
    return ColumnReport(lookup.column, len(ids), count, int(spelled.isna().sum()), _tidy(unseen))


def _dictionary_report(
    lookup: ColumnLookup, dictionary: pa.Array, distinct: np.ndarray, codes: np.ndarray
) -> ColumnReport:
    """The report counted per dictionary entry, not per row: the dictionary is small whatever the chunk.

    ``codes`` are the rows' dictionary indices with nulls as ``len(dictionary)`` (see ``_codes``).
    """
    rows = len(codes)
    per_entry = np.bincount(codes, minlength=len(dictionary) + 1)
    nulls = int(per_entry[-1])
    per_entry = per_entry[:-1]
    entries = np.flatnonzero((distinct == UNKNOWN_ID) & (per_entry > 0))
    if len(entries) == 0:
        return ColumnReport(lookup.column, rows, nulls, nulls)
    spelled = category_strings(
        dictionary.take(pa.array(entries)).to_pandas(types_mapper=_exact_pandas_type)
    ).reset_index(drop=True)
    counts = per_entry[entries]
    blank = spelled.isna().to_numpy()
    unseen = pd.Series(counts[~blank], index=spelled[~blank].to_numpy()).groupby(level=0).sum()
    missing = nulls + int(counts[blank].sum())
    return ColumnReport(lookup.column, rows, nulls + int(counts.sum()), missing, _tidy(unseen))


def _tidy(unseen: pd.Series) -> pd.Series:
    return _most_frequent_first(unseen.astype("int64").rename(None).rename_axis(None))


def prepare(
    vector_set: VectorSet, columns: Sequence[str] | None = None, unknown: str = DEFAULT_UNKNOWN
) -> dict[str, ColumnLookup]:
    """A lookup per column (default: every column of the vector set) under one unknown-category rule."""
    chosen = vector_set.columns if columns is None else list(columns)
    shrink = vector_set.metadata.get("shrink")  # the version's own shrink rule, as trained
    return {
        c: ColumnLookup(c, vector_set.vocabularies[c], vector_set.vectors[c], unknown,
                        confidence=vector_set.confidence.get(c), shrink=shrink)
        for c in chosen
    }
