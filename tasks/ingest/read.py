"""Reading a dataset as its spec describes: files, formats, encodings and headers, with errors that name them.
"""

from __future__ import annotations

import difflib
import glob
import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pyarrow as pyarrow_lib
import pyarrow.parquet as pq

from entivec.lazytasks import tasks_on_first_use
from entivec.schemas.spec import (
    ROW_ID,
    FillRule,
    RangeRule,
    Spec,
    SpecError,
    resolve_source,
)
from entivec.schemas.tables import category_columns, required_columns
from entivec.tasks.ingest.common import (  # noqa: F401 - re-exported: callers import these names from here
    _COMPRESSION_SUFFIXES,
    _CSV_SUFFIXES,
    _PARQUET_SUFFIXES,
    BOOKKEEPING,
    EXAMPLES,
    QUARANTINE_STEM,
    RAGGED,
    RAW_LINE,
    REASONS,
    SOURCE_FILE,
    SOURCE_ROW,
    InputError,
)
from entivec.tasks.ingest.csvfile import _is_utf8, _open_bytes, csv_batches, csv_header

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
            if rule.column == spec.id_name:
                raise SpecError(f"{where}{key} fills the id column {rule.column!r}; ids are never made up")
            if rule.column in numeric:
                value = number_or_none(rule.value)
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
                if number_or_none(rule.when.equals) is None:
                    raise SpecError(
                        f"{where}key '{key}.when.equals' is {rule.when.equals!r}, but column "
                        f"{rule.when.column!r} holds numbers"
                    )
    if spec.split.method == "time" and spec.split.cutoff is not None:
        cutoff = spec.split.cutoff
        if number_or_none(cutoff) is None and timestamp_or_none(cutoff) is None:
            raise SpecError(
                f"{where}key 'split.cutoff' is {cutoff!r}, which reads neither as a time (e.g. 2014-07-01, "
                f"2014-07-01T00:00:00Z) nor as a number (e.g. 2008 for a year column)"
            )


def number_or_none(value: Any) -> float | None:
    if isinstance(value, bool):
        return float(value)
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def timestamp_or_none(value: Any) -> pd.Timestamp | None:
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


def _read_header(path: Path, fmt: str, spec: Spec) -> list[str]:
    try:
        names = [str(c) for c in pq.read_schema(path).names] if fmt == "parquet" else csv_header(path, spec)
    except Exception as exc:
        raise _read_error(path, fmt, spec, exc) from None
    repeated = sorted({c for c in names if names.count(c) > 1})
    if repeated:
        raise InputError(f"{path}: column name(s) {', '.join(map(repr, repeated))} appear more than once in the header")
    return names


def _decode_error(path: Path, declared: str) -> InputError:
    where = ""
    try:
        with _open_bytes(path) as handle:
            data = handle.read()  # error path only: find the first byte that does not decode, and its line
        data.decode("utf-8-sig" if _is_utf8(declared) else declared)
    except UnicodeDecodeError as whole:
        line = data.count(b"\n", 0, whole.start) + 1
        where = f" (byte 0x{data[whole.start : whole.start + 1].hex()} on line {line})"
    except (OSError, EOFError):
        pass
    return InputError(
        f"{path}: cannot be decoded as {declared}{where}; the spec declares source.encoding: {declared}. "
        f"Set source.encoding to the file's real encoding (for example latin-1 or cp1252)"
    )


def _read_error(path: Path, fmt: str, spec: Spec, exc: Exception) -> Exception:
    """Turn a reader's exception into an InputError, except I/O trouble that a retry may cure."""
    if isinstance(exc, InputError):
        return exc
    if isinstance(exc, UnicodeDecodeError) or (
        isinstance(exc, pyarrow_lib.ArrowInvalid) and "invalid UTF8" in str(exc)
    ):
        return _decode_error(path, spec.source.encoding)
    if isinstance(exc, (FileNotFoundError, PermissionError, IsADirectoryError)):
        return InputError(f"{path}: cannot be opened ({exc.strerror or exc})")
    if isinstance(exc, OSError) and exc.errno is not None:
        return exc  # a real I/O fault (network share, disk): left as OSError so the task's retries apply
    if isinstance(exc, pd.errors.EmptyDataError) or (
        isinstance(exc, pyarrow_lib.ArrowInvalid) and "Empty CSV file" in str(exc)
    ):
        return InputError(f"{path}: the file is empty (no header, no rows)")
    if isinstance(exc, (pd.errors.ParserError, pyarrow_lib.ArrowInvalid)) and fmt == "csv":
        return InputError(
            f"{path}: not readable as CSV with delimiter {spec.source.delimiter!r} (spec key source.delimiter): {exc}"
        )
    if fmt == "parquet" and isinstance(exc, (pyarrow_lib.ArrowException, OSError, ValueError)):
        return InputError(f"{path}: not a readable Parquet file ({exc})")
    if isinstance(exc, (ValueError, OSError)):
        return InputError(f"{path}: cannot be read as {fmt} ({exc})")
    return exc


def _check_columns(path: Path, columns: list[str], spec: Spec, fmt: str) -> None:
    reserved = (*BOOKKEEPING, REASONS, *([ROW_ID] if spec.id_column is None else []))
    clash = [c for c in reserved if c in columns]
    if clash:
        raise InputError(f"{path}: column {clash[0]!r} is a name entivec reserves for bookkeeping; rename it")
    required = required_columns(spec)
    missing = [c for c in required if c not in columns]
    if not missing:
        return
    parts = [f"column {c!r} (spec key {required[c]}) is missing{close_hint(c, columns)}" for c in missing]
    shown = ", ".join(repr(c) for c in columns[:30]) + (", ..." if len(columns) > 30 else "")
    message = f"{path}: {'; '.join(parts)}. The file has {len(columns)} column(s): {shown}"
    if fmt == "csv" and len(columns) == 1:
        for other in (";", "\t", "|", ","):
            if other != spec.source.delimiter and other in columns[0]:
                message += f". The header looks {other!r}-delimited: set source.delimiter in the spec"
                break
    raise InputError(message)


def close_hint(name: str, columns: list[str]) -> str:
    by_case = {c.lower(): c for c in columns}
    if name.lower() in by_case:
        return f" (did you mean {by_case[name.lower()]!r}?)"
    close = difflib.get_close_matches(name, columns, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _partition_values(path: Path, root: Path | None) -> dict[str, str]:
    """Hive-style partition keys in the folders between ``root`` and the file (``day=2026-01-05/part-0.parquet``)."""
    if root is None:
        return {}
    keys = {}
    for part in path.relative_to(root).parts[:-1]:
        key, sep, value = part.partition("=")
        if sep and key:
            keys[unquote(key)] = unquote(value)  # writers percent-encode (pyarrow's default segment encoding)
    return keys


@dataclass
class SourceFiles:
    """The files of a spec's source, checked: same columns everywhere, every required column present."""

    pattern: str
    paths: list[Path]
    formats: list[str]
    columns: list[str]  # the first file's column order (partition keys last)
    root: Path | None = None  # the partitioned folder, when the source is one

    @property
    def names(self) -> list[str]:
        return [str(p) for p in self.paths]


def source_files(spec: Spec, spec_path: str | Path) -> SourceFiles:
    """Find and check the spec's files (one file, a glob, or a folder of Parquet files partitioned as
    ``key=value`` folders); headers only, so a missing column or a mismatched file fails before any large read."""
    check_spec_fits(spec, spec_path)
    pattern = resolve_source(spec, spec_path)
    root = Path(pattern) if Path(pattern).is_dir() else None
    if root is not None:
        paths = sorted(p for p in root.rglob("*") if p.is_file() and p.suffix.lower() in _PARQUET_SUFFIXES)
        if not paths:
            raise InputError(f"source {root}: is a folder without Parquet files (spec key source.path); use a glob "
                             f"such as {root / '*.csv'} for CSV files")
    else:
        paths = _match_files(pattern)
    formats = [_file_format(p, spec.source.format) for p in paths]
    headers = [_read_header(p, f, spec) + list(_partition_values(p, root)) for p, f in zip(paths, formats, strict=True)]
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
    return SourceFiles(pattern, paths, formats, first, root)


def file_batches(source: SourceFiles, i: int, spec: Spec, batch_rows: int = 1 << 20) -> Iterator[pd.DataFrame]:
    """The rows of the source's i-th file as frames of at most about ``batch_rows`` rows, with ``_source_file``
    and ``_source_row`` (and ``_raw_line`` where a CSV line was ragged); columns in the first file's order."""
    path, fmt = source.paths[i], source.formats[i]
    partition = _partition_values(path, source.root)
    rows = 0
    try:
        if fmt == "parquet":
            # pre_buffer=False: with it on, the reader kept every row group it had read until the file closed
            # (Arrow held 1 GiB after 36 batches of a 10 M-row file, measured), so memory grew with the file.
            for batch in pq.ParquetFile(path, pre_buffer=False).iter_batches(batch_size=batch_rows):
                frame = batch.to_pandas()
                for key, value in partition.items():
                    frame[key] = value
                frame = frame[source.columns]
                frame[SOURCE_FILE] = str(path)
                frame[SOURCE_ROW] = np.arange(rows + 1, rows + len(frame) + 1, dtype=np.int64)
                rows += len(frame)
                yield frame
        else:
            # About 100 bytes a CSV row: blocks of that many bytes give batches of roughly batch_rows rows.
            for frame in csv_batches(path, spec, source.columns, batch_bytes=max(1 << 12, batch_rows * 100)):
                rows += len(frame)
                yield frame[[*source.columns, *(c for c in BOOKKEEPING if c in frame.columns)]]
    except InputError:
        raise
    except Exception as exc:
        raise _read_error(path, fmt, spec, exc) from None
    if rows == 0:
        raise InputError(f"{path}: has a header but no data rows")


def read_source(spec: Spec, spec_path: str | Path) -> tuple[pd.DataFrame, list[str]]:
    """Read the spec's source (one file, a glob or a partitioned folder) into one frame with ``_source_file``
    and ``_source_row``: the batches of :func:`file_batches`, concatenated.

    Category and id columns are read as text. Files of a glob are read in sorted path order and must have the
    same columns (in any order; the first file's order is kept). Every file-level fault raises InputError.
    """
    source = source_files(spec, spec_path)
    frames = [frame for i in range(len(source.paths)) for frame in file_batches(source, i, spec)]
    raw = frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)
    return raw.reset_index(drop=True), source.names


# --- Prefect tasks ----------------------------------------------------------------------------------------------


def retry_on_io_only(task: Any, task_run: Any, state: Any) -> bool:
    """Retry a failed read only for I/O trouble; bad input (InputError, SpecError) fails at once."""
    exc = state.result(raise_on_failure=False)
    return isinstance(exc, OSError) and not isinstance(exc, (InputError, SpecError))


def _ingest(spec: Spec, spec_path: str | Path) -> tuple[pd.DataFrame, list[str]]:
    return read_source(spec, spec_path)


# ``ingest``: read_source as a Prefect task, made when a flow first asks for it (``entivec check`` reads headers
# without loading Prefect). An OSError with an errno (I/O trouble) is retried, bad input is not.
__getattr__ = tasks_on_first_use(globals(), ingest=(_ingest, {
    "name": "ingest", "retries": 2, "retry_delay_seconds": 2, "retry_condition_fn": retry_on_io_only}))
