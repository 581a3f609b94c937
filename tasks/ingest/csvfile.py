"""Reading one CSV file in bounded batches: compression by suffix, the declared encoding, pandas' missing
markers, and ragged lines kept as rows for the quarantine instead of stopping the file.
"""

from __future__ import annotations

import bz2
import codecs
import gzip
import lzma
import zipfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd
import pyarrow as pyarrow_lib
import pyarrow.csv as pcsv

from entivec.schemas.spec import Spec
from entivec.schemas.tables import category_columns
from entivec.tasks.ingest.common import RAW_LINE, SOURCE_FILE, SOURCE_ROW, InputError


def _python_encoding(spec: Spec, path: Path) -> str:
    declared = spec.source.encoding
    try:
        codecs.lookup(declared)
    except LookupError:
        raise InputError(
            f"{path}: source.encoding {declared!r} is not an encoding Python knows (e.g. utf-8, latin-1, cp1252)"
        ) from None
    return declared


def _is_utf8(encoding: str) -> bool:
    return codecs.lookup(encoding).name in ("utf-8", "utf-8-sig")


# The first bytes of compressed and binary formats (gzip: RFC 1952; bzip2 "BZh"; zip "PK\x03\x04" local file
# header; xz; zstandard frame magic, RFC 8878; Parquet "PAR1") and the byte-order marks of the Unicode Standard.
_MAGIC = {
    b"\x1f\x8b": ("gzip-compressed", ".gz"),
    b"BZh": ("bzip2-compressed", ".bz2"),
    b"PK\x03\x04": ("a zip archive", ".zip"),
    b"\xfd7zXZ\x00": ("xz-compressed", ".xz"),
    b"\x28\xb5\x2f\xfd": ("zstandard-compressed", ".zst"),
    b"PAR1": ("a Parquet file", ".parquet"),
}
_BOMS = (
    (b"\xff\xfe\x00\x00", "UTF-32", "utf-32"),
    (b"\x00\x00\xfe\xff", "UTF-32", "utf-32"),
    (b"\xff\xfe", "UTF-16", "utf-16"),
    (b"\xfe\xff", "UTF-16", "utf-16"),
)


def _open_bytes(path: Path) -> IO[bytes]:
    """The file's bytes, decompressed as its suffix says (gzip, bzip2, xz and zstandard streamed; zip: one member)."""
    suffix = path.suffix.lower()
    if suffix == ".gz":
        return gzip.open(path, "rb")
    if suffix == ".bz2":
        return bz2.open(path, "rb")
    if suffix == ".xz":
        return lzma.open(path, "rb")
    if suffix == ".zst":
        return pyarrow_lib.input_stream(str(path), compression="zstd")
    if suffix == ".zip":
        archive = zipfile.ZipFile(path)
        members = [m for m in archive.namelist() if not m.endswith("/")]
        if len(members) != 1:
            raise InputError(f"{path}: a zip archive must hold exactly one file to be read as CSV; it holds "
                             f"{len(members)}")
        return archive.open(members[0])
    return open(path, "rb")


def sniff_csv(path: Path, spec: Spec) -> None:
    """Refuse, with the real reason, a file named as CSV that is compressed or in another encoding than declared."""
    declared = codecs.lookup(_python_encoding(spec, path)).name
    try:
        with open(path, "rb") as handle:
            raw_head = handle.read(8)
    except OSError:
        return  # the reader reports it with its errno
    suffix = path.suffix.lower()
    for magic, (what, right) in _MAGIC.items():
        if raw_head.startswith(magic) and suffix != right:
            named = "".join(path.suffixes) or "(no suffix)"
            fix = (f"rename it to end in {path.name}{right} so entivec decompresses it"
                   if right != ".parquet" else f"rename it to end in {right} or set source.format: parquet")
            raise InputError(f"{path}: is {what}, although its name ends in {named!r}; {fix}")
    try:
        with _open_bytes(path) as handle:
            head = handle.read(4096)
    except (OSError, EOFError, zipfile.BadZipFile, lzma.LZMAError, pyarrow_lib.ArrowException) as exc:
        raise InputError(f"{path}: cannot be decompressed as its suffix {path.suffix!r} says ({exc})") from None
    for bom, family, codec in _BOMS:
        if head.startswith(bom):
            if not declared.startswith(codec):
                raise InputError(
                    f"{path}: is {family} text (it starts with the {family} byte-order mark), but the spec declares "
                    f"source.encoding: {spec.source.encoding}; set source.encoding: {codec}"
                )
            return
    sample = head[:2048]
    if len(sample) >= 8 and not declared.startswith(("utf-16", "utf-32")):
        zeros_odd, zeros_even = sample[1::2].count(0), sample[0::2].count(0)
        if max(zeros_odd, zeros_even) > 0.3 * (len(sample) // 2):
            order = "utf-16-le" if zeros_odd > zeros_even else "utf-16-be"
            raise InputError(
                f"{path}: looks like UTF-16 text without a byte-order mark (every other byte is zero), but the spec "
                f"declares source.encoding: {spec.source.encoding}; set source.encoding: {order}"
            )


# pandas' default missing-value markers, so a CSV cell reads as missing exactly where pandas.read_csv would.
try:
    from pandas._libs.parsers import STR_NA_VALUES as _PANDAS_NA
except ImportError:  # pragma: no cover - a pandas that moved it; the list as of pandas 2.x (from memory)
    _PANDAS_NA = {"", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN",
                  "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null"}
MISSING_MARKERS = sorted(_PANDAS_NA)


def _csv_reader(path: Path, spec: Spec, on_bad: Any = None, names: list[str] | None = None,
                block_bytes: int = 1 << 24) -> tuple[IO[bytes], pcsv.CSVStreamingReader]:
    encoding = _python_encoding(spec, path)
    stream = _open_bytes(path)
    read = pcsv.ReadOptions(use_threads=False, block_size=block_bytes,
                            encoding="utf8" if _is_utf8(encoding) else encoding)
    parse = pcsv.ParseOptions(delimiter=spec.source.delimiter, newlines_in_values=True, invalid_row_handler=on_bad)
    convert = pcsv.ConvertOptions(
        column_types=dict.fromkeys(names, pyarrow_lib.string()) if names else None,
        null_values=MISSING_MARKERS, strings_can_be_null=True, quoted_strings_can_be_null=True,
    )
    try:
        return stream, pcsv.open_csv(stream, read_options=read, parse_options=parse, convert_options=convert)
    except BaseException:
        stream.close()
        raise


def csv_header(path: Path, spec: Spec) -> list[str]:
    """The column names of a CSV file's first line, after checking that it is plain text as declared."""
    sniff_csv(path, spec)
    stream, reader = _csv_reader(path, spec, on_bad=lambda row: "skip", block_bytes=1 << 16)
    with stream:
        return [str(c) for c in reader.schema.names]


def _pandas_like(frame: pd.DataFrame, text: set[str]) -> pd.DataFrame:
    """Columns as pandas.read_csv would type them: text columns as text; any other column numeric when every
    value reads as a number, else left as text (the schema then names the bad cells)."""
    for column in frame.columns:
        if column in text or not pd.api.types.is_string_dtype(frame[column].dtype):
            continue
        try:
            frame[column] = pd.to_numeric(frame[column])
        except (ValueError, TypeError):
            # pandas reads a column of nothing but True/False spellings as booleans; so does this.
            words = frame[column].dropna()
            if len(words) and words.isin(list(_BOOLEANS)).all() and not frame[column].isna().any():
                frame[column] = frame[column].map(_BOOLEANS).astype(bool)
    return frame


_BOOLEANS = {"True": True, "TRUE": True, "true": True, "False": False, "FALSE": False, "false": False}


def data_row_numbers(good: int, start: int, bad: np.ndarray) -> np.ndarray:
    """Data-row numbers (1 = the first row under the header) of ``good`` well-formed rows that follow ``start``
    well-formed rows, when the rows numbered ``bad`` (sorted) were ragged and left out of the batches."""
    g = np.arange(start + 1, start + good + 1, dtype=np.int64)
    if not len(bad):
        return g
    return g + np.searchsorted(bad - np.arange(len(bad)), g, side="right")


def csv_batches(path: Path, spec: Spec, names: list[str], batch_bytes: int = 1 << 24) -> Iterator[pd.DataFrame]:
    """The rows of one CSV file as pandas frames of bounded size, every value as text or a number (see
    ``_pandas_like``), with ``_source_file`` and ``_source_row``.

    A line with too few or too many fields (RFC 4180 asks the same count on every line) does not stop the file:
    it comes back as a row whose columns are missing and whose ``_raw_line`` holds the line, for the cleaning
    step to quarantine under ``ragged_line``.
    """
    text = set(category_columns(spec))
    bad_rows: list[tuple[int, int, int, str]] = []

    def on_bad(row: Any) -> str:
        # InvalidRow.number counts records from 1 = the header, so the data-row number is one less.
        bad_rows.append((int(row.number) - 1, row.expected_columns, row.actual_columns, row.text))
        return "skip"

    seen_good = 0
    emitted_bad = 0
    stream, reader = _csv_reader(path, spec, on_bad=on_bad, names=names, block_bytes=batch_bytes)
    with stream:
        while True:
            try:
                batch = reader.read_next_batch()
            except StopIteration:
                batch = None
            bad = np.array(sorted(b[0] for b in bad_rows), dtype=np.int64)
            parts = []
            if batch is not None and batch.num_rows:
                frame = _pandas_like(batch.to_pandas(), text)
                frame[SOURCE_FILE] = str(path)
                frame[SOURCE_ROW] = data_row_numbers(batch.num_rows, seen_good, bad)
                seen_good += batch.num_rows
                parts.append(frame)
            fresh = bad_rows[emitted_bad:]
            if fresh:
                emitted_bad = len(bad_rows)
                ragged = pd.DataFrame({c: pd.Series([np.nan] * len(fresh), dtype=object) for c in names})
                ragged[SOURCE_FILE] = str(path)
                ragged[SOURCE_ROW] = np.array([b[0] for b in fresh], dtype=np.int64)
                ragged[RAW_LINE] = [f"{b[3]} ({b[2]} fields, the header has {b[1]})" for b in fresh]
                parts.append(ragged)
            if parts:
                out = parts[0] if len(parts) == 1 else pd.concat(parts, ignore_index=True)
                yield out.sort_values(SOURCE_ROW, kind="stable").reset_index(drop=True)
            if batch is None:
                return


