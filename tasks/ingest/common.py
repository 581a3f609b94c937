"""Names and the error type every ingestion module shares."""

from __future__ import annotations

import pandas as pd

from entivec.schemas.ledger import Ledger

SOURCE_FILE = "_source_file"
SOURCE_ROW = "_source_row"
RAW_LINE = "_raw_line"  # the text of a CSV line with too few or too many fields; missing for every other row
# Columns entivec adds to what it read; never data. RAW_LINE is there only when a CSV file had ragged lines.
BOOKKEEPING = (SOURCE_FILE, SOURCE_ROW, RAW_LINE)
REASONS = "_reasons"
RAGGED = "ragged_line"
QUARANTINE_STEM = "quarantine"

_CSV_SUFFIXES = {".csv", ".tsv", ".txt"}
_COMPRESSION_SUFFIXES = {".gz", ".bz2", ".zip", ".xz", ".zst"}
_PARQUET_SUFFIXES = {".parquet", ".pq", ".parq"}
EXAMPLES = 5  # row references quoted in a ledger step or an error message


class InputError(Exception):
    """Input that stops the run: the message names the file and, where it applies, the column and rows.

    ``quarantine`` and ``ledger`` are set when cleaning got as far as rejecting every row, so a caller can
    still write the quarantine for people to open.
    """

    def __init__(self, message: str, *, quarantine: pd.DataFrame | None = None, ledger: Ledger | None = None):
        super().__init__(message)
        self.quarantine = quarantine
        self.ledger = ledger


def value_kind(series: pd.Series) -> str:
    """A column's coarse type as read: number, boolean, datetime or text (int and float are one kind)."""
    if pd.api.types.is_bool_dtype(series):
        return "boolean"
    if pd.api.types.is_numeric_dtype(series):
        return "number"
    if pd.api.types.is_datetime64_any_dtype(series):
        return "datetime"
    return "text"


class KindTally:
    """The kind of every column of a table read batch by batch, as :func:`value_kind` would give on the batches
    concatenated: one value per column and batch is kept (the first present one, else the first), and the kinds
    are read from those values concatenated, so pandas' own rules for mixed batches decide (a column of numbers
    in one batch and text in another is text)."""

    def __init__(self) -> None:
        self.values: dict[str, list[pd.Series]] = {}

    def update(self, frame: pd.DataFrame) -> None:
        for column in frame.columns:
            if column in BOOKKEEPING:
                continue
            series = frame[column]
            present = series[series.notna()]
            first = (present if len(present) else series).iloc[:1]
            # Rebuilt from its value: a slice (and an Arrow-backed ".copy()", which shares the immutable buffers)
            # would keep the whole batch's column alive, for every batch of the table (1 GiB at 10 M rows).
            self.values.setdefault(str(column), []).append(
                pd.Series(first.to_list(), dtype=first.dtype, index=first.index, name=first.name))

    def result(self) -> dict[str, str]:
        return {c: value_kind(pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0])
                for c, parts in self.values.items()}
