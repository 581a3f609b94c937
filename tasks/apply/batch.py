"""Batch apply steps: read a table in bounded chunks, append vector columns, write Parquet all-or-nothing.

Memory stays bounded by the chunk size whatever the input size: the input (one file, a glob or a partitioned
folder, see ``inputs``) is read ``chunk_rows`` rows at a time (Parquet batch by batch, CSV block by block),
each chunk's vectors are gathered, written as one Parquet row group and dropped. Category columns are read
dictionary-encoded (a CSV's always as text, never guessed as numbers), so each distinct category of a chunk is
looked up once and the rows only index the result. Input columns keep their types: category columns are
written back as the text they were (not dictionary-encoded), a CSV's dates and times stay the text they were
(the job never guesses dates), other columns as read; then one float32 column per vector component
(``<column>__vec<i>``).

The output goes to a hidden temporary file beside the target (mode per the umask) and is renamed into place
only after the last chunk: a failure at any point (bad column, unreadable row, an unknown category under the
``error`` rule, an unseen share above ``max_unknown_share``, a full disk) leaves no partial output. The
Parquet key-value metadata records the model name, version, run id, the aliases at the time, the data
fingerprint of the version, the unknown-category rule, the input files and the time of writing.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.vector_set import VectorSet
from entivec.tasks.apply.inputs import (  # noqa: F401  (input_format, open_input: this module's API before)
    DEFAULT_CHUNK_ROWS,
    ApplyInputError,
    InputTable,
    input_format,
    open_input,
    open_inputs,
    read_chunks,
)
from entivec.tasks.apply.lookup import (
    CategoryTypeError,
    ColumnLookup,
    ColumnReport,
    UnknownCategoryError,
    arrow_kind,
    category_type_problem,
    prepare,
)
from entivec.tasks.apply.outputs import OutputError, OutputSet, output_error, writing_failed

METADATA_PREFIX = "entivec."


class UnknownShareError(ApplyInputError):
    """A column's share of rows that met the unknown-category rule passed ``max_unknown_share``."""


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
    aliases: list[str] = field(default_factory=list)
    data_fingerprint: str = ""
    input_files: list[str] = field(default_factory=list)
    rows: int = 0
    chunks: int = 0
    largest_chunk: int = 0
    seconds: float = 0.0
    reports: dict[str, ColumnReport] = field(default_factory=dict)

    def report_rows(self) -> list[dict]:
        return [self.reports[c].as_dict() for c in self.columns]


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
    stored: dict[str, pa.DataType] | None = None,
) -> tuple[pa.RecordBatch, dict[str, ColumnReport]]:
    """The batch with every lookup column's vector components appended (float32), and what each column met.

    ``stored`` gives category columns back the type the input stores them as (read dictionary-encoded for the
    lookup, written as the text they were).
    """
    arrays, names, reports = list(batch.columns), list(batch.schema.names), {}
    for col, to_type in (stored or {}).items():
        i = names.index(col)
        if arrays[i].type != to_type:
            arrays[i] = arrays[i].cast(to_type)
    for col, lookup in lookups.items():
        out = buffers.take(col, lookup.dimension, batch.num_rows) if buffers is not None else None
        # (dimension, rows), each component contiguous: Arrow takes them as they are
        components, report = lookup.vectors_and_report(batch.column(col), out, source)
        arrays.extend(pa.array(components[k]) for k in range(lookup.dimension))
        names.extend(lookup.names)
        reports[col] = report
    return pa.RecordBatch.from_arrays(arrays, names=names), reports


def output_schema(table: InputTable, lookups: dict[str, ColumnLookup], metadata: dict[str, str]) -> pa.Schema:
    """Input columns as stored, partition columns, then the vector components; pandas' own column notes dropped
    (they no longer fit)."""
    schema = table.schema
    fields = [pa.field(f.name, table.stored.get(f.name, f.type)) for f in schema]
    fields += [pa.field(k, pa.string()) for k in table.partition if k not in schema.names]
    fields += [pa.field(n, pa.float32()) for lookup in lookups.values() for n in lookup.names]
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
        "input_files": json.dumps(result.input_files),
        "aliases": json.dumps(result.aliases),
        "data_fingerprint": result.data_fingerprint,
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
    max_unknown_share: float | None = None,
    aliases: list[str] | None = None,
) -> ApplyResult:
    """Append vector columns to every row of ``input_path`` and write ``output_path`` (Parquet) atomically.

    ``input_path`` is a file, a glob or a (partitioned) folder. With ``max_unknown_share`` the job fails with
    :class:`UnknownShareError`, writing nothing, when any column's share of rows that met the unknown rule is
    above it.
    """
    if chunk_rows < 1:
        raise ApplyInputError(f"chunk size must be at least 1 row, got {chunk_rows}")
    if max_unknown_share is not None and not 0.0 <= max_unknown_share <= 1.0:
        raise ApplyInputError(f"the largest unknown share must be between 0 and 1, got {max_unknown_share}")
    output = Path(output_path)
    tables = open_inputs(input_path, list(columns) if columns else vector_set.columns, chunk_rows)
    table = tables[0]
    chosen = choose_columns(table, vector_set, columns)
    if any(output.resolve() == t.path.resolve() for t in tables):
        raise ApplyInputError(f"{output}: the output would overwrite the input; choose another path")
    lookups = prepare(vector_set, chosen, unknown)
    check_input(table, lookups)
    result = ApplyResult(
        model_name, str(version), run_id, str(input_path), str(output), unknown, chosen,
        datetime.now(UTC).isoformat(timespec="seconds"), aliases=sorted(aliases or []),
        data_fingerprint=str(vector_set.metadata.get("data_fingerprint", "")),
        input_files=[str(t.path) for t in tables],
        reports={c: ColumnReport(c) for c in chosen},
    )
    schema = output_schema(table, lookups, provenance(result))
    total = sum(t.rows or 0 for t in tables)
    started = time.perf_counter()
    buffers = ChunkBuffers()
    outputs = OutputSet(f"the apply output {output.name}")
    part = table
    try:
        partial = outputs.path(output)
        # dictionary pages for the input's columns as pyarrow would write them; none for the vector columns,
        # whose per-chunk dictionaries of floats would cost about 4x the write time for half the size
        with pq.ParquetWriter(partial, schema, use_dictionary=list(table.schema.names)) as writer:
            for part in tables:
                for batch in read_chunks(part, chosen, chunk_rows):
                    out, reports = append_vectors(batch, lookups, str(part.path), buffers, part.stored)
                    writer.write_batch(out)  # one row group per chunk, written before the buffers are reused
                    del out
                    for col, report in reports.items():
                        result.reports[col] = result.reports[col].add(report)
                    result.rows += batch.num_rows
                    result.chunks += 1
                    result.largest_chunk = max(result.largest_chunk, batch.num_rows)
                    if progress is not None:
                        progress(result.rows, max(total, result.rows))
        check_unknown_share(result, max_unknown_share)
        outputs.commit()
    except UnknownCategoryError as exc:
        raise ApplyInputError(str(exc)) from exc
    except CategoryTypeError as exc:  # a CSV block whose column changed type midway
        raise ApplyInputError(f"{part.path}: {exc}") from exc
    except pa.ArrowInvalid as exc:  # a row the reader cannot parse, a value that breaks the column's type
        raise ApplyInputError(f"{part.path}: cannot be read as {part.format} ({exc})") from exc
    except OSError as exc:  # a full disk, a size limit, no permission: the output's fault, not the input's
        if isinstance(exc, OutputError) or not writing_failed(exc):
            raise
        raise output_error(outputs.what, output, exc) from exc
    finally:
        outputs.discard()  # after a commit only leftovers of a failure; the output itself stays
    result.seconds = time.perf_counter() - started
    return result


def check_unknown_share(result: ApplyResult, limit: float | None) -> None:
    """Refuse the output when any column's unknown share passes ``limit``, naming every such column."""
    if limit is None:
        return
    over = [r for r in result.reports.values() if r.unknown_share > limit]
    if over:
        said = "; ".join(
            f"column {r.column!r}: {100 * r.unknown_share:.2f}% of {r.rows:,} rows unknown "
            f"({r.unknown - r.missing:,} unseen, {r.missing:,} missing; most frequent unseen: "
            f"{', '.join(repr(c) for c, _ in r.top_unseen(3)) or 'none'})"
            for r in over
        )
        raise UnknownShareError(
            f"{result.input_path}: {said}; the largest unknown share allowed is {100 * limit:.2f}%. "
            "Nothing was written"
        )


@task(name="apply-vectors", cache_policy=NO_CACHE)
def apply_file_task(**kwargs) -> ApplyResult:
    return apply_file(**kwargs)

