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


