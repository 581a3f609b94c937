"""Which files an apply job reads: one file, a glob, or a partitioned folder, in a fixed order, with row totals.

``--input`` takes what ``train`` takes (one file or a glob, ``**`` included) and also a folder: every CSV or
Parquet file below it, in sorted path order. Folder names of the form ``key=value`` between the given folder and
a file (the usual way of partitioning a table by a column, e.g. ``week=2026-48/part-0.parquet``) become text
columns ``key`` of that file's rows, unless the files already hold a column of that name.

CSV files have no row count up front; :func:`csv_rows` counts line ends once (a pass that runs at the speed of
reading the file), so the progress shows a real total rather than rows-so-far.
"""

from __future__ import annotations

import glob
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from entivec.tasks.apply.lookup import arrow_kind
from entivec.tasks.ingest.read import InputError

DEFAULT_CHUNK_ROWS = 1_000_000
DATA_SUFFIXES = (".csv", ".tsv", ".txt", ".parquet", ".pq", ".parq")
COMPRESSED = (".gz", ".bz2", ".zst", ".lz4")
_COUNT_BLOCK = 1 << 24


@dataclass
class InputFile:
    path: Path
    partition: dict[str, str] = field(default_factory=dict)  # key=value folder names above the file


def _is_data_file(path: Path) -> bool:
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in COMPRESSED:
        suffixes = suffixes[:-1]
    return bool(suffixes) and suffixes[-1] in DATA_SUFFIXES and not path.name.startswith((".", "_"))


def _partition(path: Path, root: Path) -> dict[str, str]:
    parts = path.relative_to(root).parts[:-1]
    return dict(part.split("=", 1) for part in parts if "=" in part and not part.startswith("="))


def match_inputs(pattern: str | Path) -> list[InputFile]:
    """The files ``pattern`` names (a file, a glob, or a folder), sorted by path; an error if there are none."""
    text = str(pattern)
    if glob.has_magic(text):
        found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
        if not found:
            raise InputError(f"{text}: no file matches this glob")
        root = Path(text.split("*")[0].split("?")[0].split("[")[0])
        root = root if root.is_dir() else root.parent
        return [InputFile(p, _partition(p, root) if p.is_relative_to(root) else {}) for p in found]
    path = Path(text)
    if path.is_dir():
        found = sorted(p for p in path.rglob("*") if p.is_file() and _is_data_file(p))
        if not found:
            raise InputError(f"{path}: the folder holds no .csv, .tsv or .parquet file (hidden files are skipped)")
        return [InputFile(p, _partition(p, path)) for p in found]
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    return [InputFile(path)]


def check_partitions(files: list[InputFile]) -> list[str]:
    """The partition keys, the same for every file (a folder layout that mixes them is refused)."""
    keys = list(files[0].partition)
    for item in files[1:]:
        if list(item.partition) != keys:
            raise InputError(
                f"{item.path}: partition folders {list(item.partition) or 'none'} differ from "
                f"{files[0].path}'s ({keys or 'none'}); apply one partitioned table at a time"
            )
    return keys


def csv_rows(path: Path) -> int:
    """Data rows of a CSV file: line ends, less the header, plus a last line without an end."""
    lines, last = 0, b"\n"
    with pa.input_stream(str(path), compression="detect") as source:
        while True:
            block = source.read(_COUNT_BLOCK)
            if not block:
                break
            lines += block.count(b"\n")
            last = block[-1:]
    if last != b"\n":
        lines += 1
    return max(lines - 1, 0)


# --- opening and reading the files -------------------------------------------------------------------

_CSV_SUFFIXES = {".csv": ",", ".tsv": "\t", ".txt": ","}
_PARQUET_SUFFIXES = {".parquet", ".pq", ".parq"}
_SAMPLE_BYTES = 1 << 20
_CATEGORY_TYPE = pa.dictionary(pa.int32(), pa.string())

class ApplyInputError(InputError):
    """An input table the apply job cannot use; the message names the file and, where it applies, the column."""


@dataclass
class InputTable:
    """What the apply job knows about its input before reading any row."""

    path: Path
    format: str  # "csv" or "parquet"
    schema: pa.Schema  # as chunks will arrive: category columns dictionary-encoded
    rows: int | None  # known up front for Parquet
    size_bytes: int
    delimiter: str = ","
    block_size: int = 0  # CSV bytes read at a time, sized for the chunk rows
    partition: dict[str, str] = field(default_factory=dict)  # key=value folders: constant text columns
    stored: dict[str, pa.DataType] = field(default_factory=dict)  # category columns' types as the input has them


def input_format(path: Path) -> tuple[str, str]:
    """('parquet' | 'csv', delimiter) from the file name; '.gz' and the like are read through."""
    suffixes = [s.lower() for s in path.suffixes]
    core = suffixes[-2] if len(suffixes) >= 2 and suffixes[-1] in {".gz", ".bz2", ".zst", ".lz4"} else (
        suffixes[-1] if suffixes else ""
    )
    if core in _PARQUET_SUFFIXES:
        return "parquet", ","
    if core in _CSV_SUFFIXES:
        return "csv", _CSV_SUFFIXES[core]
    raise ApplyInputError(
        f"{path}: cannot tell the format from the name; use a .parquet, .csv or .tsv file (optionally .gz)"
    )


def open_input(
    path: str | Path | InputFile,
    category_columns: list[str],
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    like: InputTable | None = None,
) -> InputTable:
    """Read the input's schema (no rows), with the wanted category columns as they will arrive.

    A CSV's column types are inferred from its first block, the same block the chunks will start with; with
    ``like`` (the first file of a glob or folder) a CSV is read with that file's types, and any file must have
    the same columns and types as it, so that the output is one table.
    """
    item = path if isinstance(path, InputFile) else InputFile(Path(path))
    path = item.path
    if not path.is_file():
        raise ApplyInputError(f"{path}: no such file")
    fmt, delimiter = input_format(path)
    size = path.stat().st_size
    try:
        if fmt == "parquet":
            parquet = pq.ParquetFile(path)
            text = _text_columns(parquet.schema_arrow, category_columns)
            stored = {c: parquet.schema_arrow.field(c).type for c in text}
            schema = pq.ParquetFile(path, read_dictionary=text).schema_arrow
            table = InputTable(path, fmt, schema, parquet.metadata.num_rows, size, partition=item.partition,
                               stored=stored)
        else:
            block = _csv_block_size(path, chunk_rows)
            schema = _csv_schema(path, delimiter, category_columns, block)
            if like is not None and like.format == "csv" and schema.names == like.schema.names:
                schema = like.schema  # a later file's first block may guess other types: the first file's hold
            stored = {c: pa.string() for c in category_columns if c in schema.names}
            table = InputTable(path, fmt, schema, csv_rows(path), size, delimiter, block, item.partition, stored)
    except ApplyInputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise ApplyInputError(f"{path}: not readable as {fmt} ({exc})") from None
    if like is not None and _plain(table) != _plain(like):
        raise ApplyInputError(
            f"{path}: its columns differ from {like.path}'s ({_difference(_plain(table), _plain(like))}); "
            "every file of one apply input must have the same columns and types"
        )
    return table


def _plain(table: InputTable) -> pa.Schema:
    """The input's columns as they are stored (category columns without the reading's dictionary)."""
    return pa.schema([pa.field(f.name, table.stored.get(f.name, f.type)) for f in table.schema])


def _difference(a: pa.Schema, b: pa.Schema) -> str:
    for name in dict.fromkeys(a.names + b.names):
        if name not in a.names or name not in b.names:
            return f"column {name!r} is in only one of them"
        if a.field(name).type != b.field(name).type:
            return f"column {name!r} is {a.field(name).type} here, {b.field(name).type} there"
    return "column order"


def open_inputs(
    pattern: str | Path, category_columns: list[str], chunk_rows: int = DEFAULT_CHUNK_ROWS
) -> list[InputTable]:
    """Every file ``pattern`` names (a file, a glob or a folder), opened; all with the first one's columns."""
    try:
        files = match_inputs(pattern)
        check_partitions(files)
    except InputError as exc:
        raise ApplyInputError(str(exc)) from None
    first = open_input(files[0], category_columns, chunk_rows)
    return [first] + [open_input(f, category_columns, chunk_rows, like=first) for f in files[1:]]


def _text_columns(schema: pa.Schema, wanted: list[str]) -> list[str]:
    """Columns to read dictionary-encoded: the wanted ones stored as text."""
    return [c for c in wanted if c in schema.names and arrow_kind(schema.field(c).type) == "text"]


def _csv_blocks(path: Path, block_size: int) -> Iterator[bytes]:
    """The file's text in blocks of about ``block_size`` bytes, each ending at a line end.

    Read here rather than by Arrow's streaming reader, whose background read-ahead holds up to 32 blocks:
    on a large file that is many chunks' worth of text in memory at once. Like Arrow's reader with its default
    options, a line end always ends a row (no line breaks inside quoted values).
    """
    pending = b""
    with pa.input_stream(str(path), compression="detect") as source:
        while True:
            data = source.read(block_size)
            if not data:
                break
            text = pending + data if pending else data
            cut = text.rfind(b"\n") + 1
            if cut == 0:
                pending = text
                continue
            pending = text[cut:]
            yield text[:cut]
    if pending.strip():
        yield pending + b"\n"


def _parse_csv(block: bytes, delimiter: str, column_types: dict, names: list[str] | None) -> pa.Table:
    return pacsv.read_csv(
        pa.BufferReader(block),
        # two pieces parse in parallel on two cores; the caller joins them into one batch
        read_options=pacsv.ReadOptions(column_names=names, block_size=max(len(block) // 2 + 1, 1 << 20)),
        parse_options=pacsv.ParseOptions(delimiter=delimiter),
        # pandas' missing markers ('', 'NA', 'null', ...), as ingestion reads them, also in text columns
        convert_options=pacsv.ConvertOptions(column_types=column_types, strings_can_be_null=True),
    )


def _csv_schema(path: Path, delimiter: str, category_columns: list[str], block_size: int) -> pa.Schema:
    """Column types from the first block (category columns as dictionary-encoded text, always)."""
    first = next(_csv_blocks(path, block_size), None)
    if first is None:
        raise ApplyInputError(f"{path}: the file is empty (no header, no rows)")
    schema = _parse_csv(first, delimiter, {c: _CATEGORY_TYPE for c in category_columns}, None).schema
    # a column empty throughout the first block has no type yet: text is the one that takes any later value;
    # dates and times stay the text they are (a guess at a format would change what the file says)
    return pa.schema([f.with_type(pa.string()) if _keep_as_text(f.type) else f for f in schema])


def _keep_as_text(arrow_type: pa.DataType) -> bool:
    return pa.types.is_null(arrow_type) or pa.types.is_temporal(arrow_type)


def read_chunks(table: InputTable, category_columns: list[str], chunk_rows: int) -> Iterator[pa.RecordBatch]:
    """The input as record batches of at most ``chunk_rows`` rows, category columns dictionary-encoded, with
    the file's partition columns (``key=value`` folders) appended as text."""
    extra = {k: v for k, v in table.partition.items() if k not in table.schema.names}
    for batch in _file_chunks(table, category_columns, chunk_rows):
        if extra:
            constant = [_constant(value, batch.num_rows) for value in extra.values()]
            batch = pa.RecordBatch.from_arrays([*batch.columns, *constant], names=[*batch.schema.names, *extra])
        yield batch


def _constant(value: str, rows: int) -> pa.Array:
    indices = pa.array(np.zeros(rows, dtype=np.int32))
    return pa.DictionaryArray.from_arrays(indices, pa.array([value], pa.string())).cast(pa.string())


def _file_chunks(table: InputTable, category_columns: list[str], chunk_rows: int) -> Iterator[pa.RecordBatch]:
    if table.format == "parquet":
        parquet = pq.ParquetFile(table.path, read_dictionary=_text_columns(table.schema, category_columns))
        try:
            yield from parquet.iter_batches(batch_size=chunk_rows, use_threads=True)
        finally:
            parquet.close()
        return
    types = {f.name: f.type for f in table.schema}
    for i, block in enumerate(_csv_blocks(table.path, table.block_size)):
        parsed = _parse_csv(block, table.delimiter, types, None if i == 0 else table.schema.names)
        del block
        # a block may hold more rows than estimated: slices of one joined batch, at most chunk_rows each
        yield from parsed.combine_chunks().to_batches(max_chunksize=chunk_rows)


def _csv_block_size(path: Path, chunk_rows: int) -> int:
    """Bytes of CSV text that hold about ``chunk_rows`` rows, estimated from the file's first megabyte."""
    with pa.input_stream(str(path), compression="detect") as source:
        sample = source.read(_SAMPLE_BYTES)
    lines = max(sample.count(b"\n"), 1)
    per_row = max(len(sample) / lines, 1.0)
    # aim a little under the chunk size, so that a block rarely spills a sliver of rows into a chunk of its own
    return int(min(max(0.95 * per_row * chunk_rows, 1 << 16), 1 << 30))


