"""Batch apply steps: read a table in bounded chunks, append vector columns, write Parquet all-or-nothing.

Memory stays bounded by the chunk size whatever the input size: the input is read ``chunk_rows`` rows at a
time (Parquet batch by batch, CSV block by block), each chunk's vectors are gathered, written as one Parquet
row group and dropped. Category columns are read dictionary-encoded (a CSV's always as text, never guessed as
numbers), so each distinct category of a chunk is looked up once and the rows only index the result; they are
written back dictionary-encoded, every other input column unchanged, followed by one float32 column per vector
component (``<column>__vec<i>``).

The output goes to a hidden temporary file beside the target and is renamed into place only after the last
chunk: a failure at any point (bad column, unreadable row, an unknown category under the ``error`` rule)
leaves no partial output. The Parquet key-value metadata records the model name, version, run id, the
unknown-category rule, the input file and the time of writing.
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.vector_set import VectorSet
from entivec.tasks.apply.lookup import (
    CategoryTypeError,
    ColumnLookup,
    ColumnReport,
    UnknownCategoryError,
    arrow_kind,
    category_type_problem,
    prepare,
)
from entivec.tasks.ingest.read import InputError

DEFAULT_CHUNK_ROWS = 1_000_000
METADATA_PREFIX = "entivec."
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


@dataclass
class ApplyResult:
    """The report of one apply run: which version produced the output, and what each column met."""

    model_name: str
    version: str
    run_id: str
    input_path: str
    output_path: str
    unknown: str
    columns: list[str]
    created_at: str
    rows: int = 0
    chunks: int = 0
    largest_chunk: int = 0
    seconds: float = 0.0
    reports: dict[str, ColumnReport] = field(default_factory=dict)

    def report_rows(self) -> list[dict]:
        return [self.reports[c].as_dict() for c in self.columns]


# --- the input ----------------------------------------------------------------------------------------------


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


def open_input(path: str | Path, category_columns: list[str], chunk_rows: int = DEFAULT_CHUNK_ROWS) -> InputTable:
    """Read the input's schema (no rows), with the wanted category columns as they will arrive.

    A CSV's column types are inferred from its first block, the same block the chunks will start with.
    """
    path = Path(path)
    if not path.is_file():
        raise ApplyInputError(f"{path}: no such file")
    fmt, delimiter = input_format(path)
    size = path.stat().st_size
    try:
        if fmt == "parquet":
            parquet = pq.ParquetFile(path)
            text = _text_columns(parquet.schema_arrow, category_columns)
            schema = pq.ParquetFile(path, read_dictionary=text).schema_arrow
            return InputTable(path, fmt, schema, parquet.metadata.num_rows, size)
        block = _csv_block_size(path, chunk_rows)
        schema = _csv_schema(path, delimiter, category_columns, block)
        return InputTable(path, fmt, schema, None, size, delimiter, block)
    except ApplyInputError:
        raise
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise ApplyInputError(f"{path}: not readable as {fmt} ({exc})") from None


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
    # a column empty throughout the first block has no type yet: text is the one that takes any later value
    return pa.schema([f.with_type(pa.string()) if pa.types.is_null(f.type) else f for f in schema])


def choose_columns(table: InputTable, vector_set: VectorSet, columns: list[str] | None) -> list[str]:
    """The category columns to give vectors: every column of the vector set unless ``columns`` names some."""
    known = vector_set.columns
    wanted = known if not columns else list(dict.fromkeys(columns))  # each once, in the order given
    for col in wanted:
        if col not in known:
            raise ApplyInputError(
                f"column {col!r} has no vectors in this vector set; it has vectors for: {', '.join(known)}"
            )
    missing = [c for c in wanted if c not in table.schema.names]
    if missing:
        shown = ", ".join(repr(c) for c in table.schema.names[:30])
        raise ApplyInputError(
            f"{table.path}: column {missing[0]!r} is missing"
            + (f" (and {', '.join(repr(c) for c in missing[1:])})" if len(missing) > 1 else "")
            + f"; the file has: {shown}. Choose columns with --columns to apply only some"
        )
    return wanted


def check_input(table: InputTable, lookups: dict[str, ColumnLookup]) -> None:
    """Refuse category columns of a type that cannot hold the vocabulary, and vector columns that exist."""
    for col, lookup in lookups.items():
        arrow_type = table.schema.field(col).type
        problem = category_type_problem(arrow_kind(arrow_type), str(arrow_type), lookup.vocabulary)
        if problem:
            raise ApplyInputError(f"{table.path}: column {col!r} {problem}")
        clash = [n for n in lookup.names if n in table.schema.names]
        if clash:
            raise ApplyInputError(
                f"{table.path}: column {clash[0]!r} already exists (vectors applied before?); "
                "drop those columns or apply to the original table"
            )


def read_chunks(table: InputTable, category_columns: list[str], chunk_rows: int) -> Iterator[pa.RecordBatch]:
    """The input as record batches of at most ``chunk_rows`` rows, category columns dictionary-encoded."""
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


# --- the work on one chunk ----------------------------------------------------------------------------------


class ChunkBuffers:
    """Output buffers reused from chunk to chunk, one per column, grown to the largest chunk seen.

    Fresh memory for every chunk would cost a page fault per 4 KiB, as much as the gather itself. A batch
    built on these buffers is valid until the next chunk is gathered into them: write it before that.
    """

    def __init__(self) -> None:
        self._flat: dict[str, np.ndarray] = {}

    def take(self, column: str, dimension: int, rows: int) -> np.ndarray:
        size = dimension * rows
        flat = self._flat.get(column)
        if flat is None or flat.size < size:
            flat = self._flat[column] = np.empty(size, dtype=np.float32)
        return flat[:size].reshape(dimension, rows)


def append_vectors(
    batch: pa.RecordBatch,
    lookups: dict[str, ColumnLookup],
    source: str = "",
    buffers: ChunkBuffers | None = None,
) -> tuple[pa.RecordBatch, dict[str, ColumnReport]]:
    """The batch with every lookup column's vector components appended (float32), and what each column met."""
    arrays, names, reports = list(batch.columns), list(batch.schema.names), {}
    for col, lookup in lookups.items():
        out = buffers.take(col, lookup.dimension, batch.num_rows) if buffers is not None else None
        # (dimension, rows), each component contiguous: Arrow takes them as they are
        components, report = lookup.vectors_and_report(batch.column(col), out, source)
        arrays.extend(pa.array(components[k]) for k in range(lookup.dimension))
        names.extend(lookup.names)
        reports[col] = report
    return pa.RecordBatch.from_arrays(arrays, names=names), reports


def output_schema(schema: pa.Schema, lookups: dict[str, ColumnLookup], metadata: dict[str, str]) -> pa.Schema:
    """Input columns, then the vector components; pandas' own column notes dropped (they no longer fit)."""
    fields = list(schema) + [pa.field(n, pa.float32()) for lookup in lookups.values() for n in lookup.names]
    kept = {k: v for k, v in (schema.metadata or {}).items() if k != b"pandas"}
    kept.update({f"{METADATA_PREFIX}{k}".encode(): str(v).encode() for k, v in metadata.items()})
    return pa.schema(fields, metadata=kept)


def provenance(result: ApplyResult) -> dict[str, str]:
    """The key-value metadata an output carries (keys get the ``entivec.`` prefix)."""
    return {
        "model_name": result.model_name,
        "version": result.version,
        "run_id": result.run_id,
        "created_at": result.created_at,
        "unknown_rule": result.unknown,
        "columns": json.dumps(result.columns),
        "input": result.input_path,
    }


def read_provenance(path: str | Path) -> dict[str, str]:
    """The ``entivec.*`` key-value metadata of a Parquet file written by the apply job."""
    raw = pq.read_metadata(path).metadata or {}
    return {
        k.decode().removeprefix(METADATA_PREFIX): v.decode()
        for k, v in raw.items()
        if k.decode().startswith(METADATA_PREFIX)
    }


# --- the whole file -----------------------------------------------------------------------------------------

Progress = Callable[[int, int], None]  # (rows done so far, rows expected or 0 when unknown)


def apply_file(
    *,
    model_name: str,
    version: str,
    run_id: str,
    vector_set: VectorSet,
    input_path: str | Path,
    output_path: str | Path,
    columns: list[str] | None = None,
    unknown: str = "unknown_row",
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    progress: Progress | None = None,
) -> ApplyResult:
    """Append vector columns to every row of ``input_path`` and write ``output_path`` (Parquet) atomically."""
    if chunk_rows < 1:
        raise ApplyInputError(f"chunk size must be at least 1 row, got {chunk_rows}")
    output = Path(output_path)
    table = open_input(input_path, list(columns) if columns else vector_set.columns, chunk_rows)
    chosen = choose_columns(table, vector_set, columns)
    if output.resolve() == table.path.resolve():
        raise ApplyInputError(f"{output}: the output would overwrite the input; choose another path")
    lookups = prepare(vector_set, chosen, unknown)
    check_input(table, lookups)
    result = ApplyResult(
        model_name, str(version), run_id, str(table.path), str(output), unknown, chosen,
        datetime.now(UTC).isoformat(timespec="seconds"),
        reports={c: ColumnReport(c) for c in chosen},
    )
    schema = output_schema(table.schema, lookups, provenance(result))
    output.parent.mkdir(parents=True, exist_ok=True)
    handle, partial = tempfile.mkstemp(prefix=f".{output.name}.", suffix=".partial", dir=output.parent)
    os.close(handle)
    started = time.perf_counter()
    buffers = ChunkBuffers()
    try:
        # dictionary pages for the input's columns as pyarrow would write them; none for the vector columns,
        # whose per-chunk dictionaries of floats would cost about 4x the write time for half the size
        with pq.ParquetWriter(partial, schema, use_dictionary=list(table.schema.names)) as writer:
            for batch in read_chunks(table, chosen, chunk_rows):
                out, reports = append_vectors(batch, lookups, str(table.path), buffers)
                writer.write_batch(out)  # one row group per chunk, written before the buffers are reused
                del out
                for col, report in reports.items():
                    result.reports[col] = result.reports[col].add(report)
                result.rows += batch.num_rows
                result.chunks += 1
                result.largest_chunk = max(result.largest_chunk, batch.num_rows)
                if progress is not None:
                    progress(result.rows, table.rows or 0)
        os.replace(partial, output)
    except UnknownCategoryError as exc:
        raise ApplyInputError(str(exc)) from exc
    except CategoryTypeError as exc:  # a CSV block whose column changed type midway
        raise ApplyInputError(f"{table.path}: {exc}") from exc
    except pa.ArrowInvalid as exc:  # a row the reader cannot parse, a value that breaks the column's type
        raise ApplyInputError(f"{table.path}: cannot be read as {table.format} ({exc})") from exc
    finally:
        if os.path.exists(partial):
            os.unlink(partial)
    result.seconds = time.perf_counter() - started
    return result


@task(name="apply-vectors", cache_policy=NO_CACHE)
def apply_file_task(**kwargs) -> ApplyResult:
    return apply_file(**kwargs)

