"""Streamed ingestion per partition: each file of the source cleaned by a Dask worker into its own part files.

A partition is one file of the source. Its rows are read in the very batches the single-process stream reads
(``file_batches``, per file), and each batch goes through the same :class:`CleanWriter` (the same pandera schema,
rules and model-readiness checks of :func:`validate_and_clean`), told which of its rows share an id with any other
row of the whole table (found by the first pass's on-disk hash partitioning). The first pass gives every file's row
count, so every partition knows where its rows start in the whole table: row numbers, duplicate flags and the order
of the merged files are those of the single-process run.

Each worker writes ``cleaned-NNNNN.arrow`` and ``quarantine-NNNNN.parquet`` into the run's working folder, which
every worker and the trainer must reach (one machine, or a shared file system). The reductions are made in file
order on the caller: batch ledgers summed as the stream sums them, newest times, and the parts appended into the
one ``cleaned.arrow`` and ``quarantine.parquet`` the rest of the run reads.

:data:`Mapper` is how a list of such pieces of work is run: :func:`in_process` (one after another, here) or
:func:`dask_mapper` (``client.map`` over the cluster's workers, results gathered in order).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from entivec.schemas.ledger import Ledger
from entivec.schemas.spec import Spec
from entivec.tasks.ingest.read import InputError, SourceFiles, file_batches
from entivec.tasks.ingest.stream import (
    BATCH_ROWS,
    CLEANED,
    QUARANTINE,
    CleanWriter,
    FirstPass,
    MappedFile,
    StreamedTable,
    finish_clean,
)

# fn, items -> fn(item) for every item, in the items' order, as an iterator: a caller that sums the results
# holds one at a time (counts of 400 ranges of 50,000 categories each would otherwise all wait in memory).
Mapper = Callable[[Callable[[Any], Any], list], Iterator[Any]]
PARTS = "parts"
MERGE = "merge parts"  # the stage that appends the parts, in StreamedTable.seconds


def in_process(fn: Callable[[Any], Any], items: list) -> Iterator[Any]:
    """Run ``fn`` on every item here, in order, each when its result is asked for."""
    return (fn(item) for item in items)


def dask_mapper(client: Any, timeout: float | None = None) -> Mapper:
    """Run ``fn`` on every item as Dask tasks (``client.map``, not cached: each call is new work); results come
    back in the items' order, and a worker's exception is raised here. ``timeout`` (seconds): give up waiting
    (``TimeoutError``, the remaining tasks cancelled) when the tasks have not all finished by then, e.g. when a
    cluster lost its workers. Only this client is used (a flow's runner does not make its client the default)."""

    def run(fn: Callable[[Any], Any], items: list) -> Iterator[Any]:
        futures = client.map(fn, items, pure=False)  # all submitted now; the workers need not wait for the caller
        deadline = None if timeout is None else time.monotonic() + timeout
        try:
            while futures:
                future = futures.pop(0)  # released once read: its result leaves the worker's memory
                yield future.result(timeout=None if deadline is None else max(0.0, deadline - time.monotonic()))
        finally:
            if futures:
                client.cancel(futures)

    return run


@dataclass
class CleanedPart:
    """What one partition's worker left in the working folder, and its batches' ledgers and newest times."""

    index: int
    ledgers: list[Ledger]
    used: int
    tops: list[object]
    cleaned: Path | None  # None when every row of the file was quarantined
    quarantine: Path


def clean_file(item: tuple[int, int, np.ndarray], *, spec: Spec, source: SourceFiles, folder: Path,
               batch_rows: int) -> CleanedPart:
    """Clean file ``i`` of the source, whose first row is at ``offset`` in the whole table; ``shared``: the sorted
    positions (in the whole table) of its rows whose id another row shares."""
    i, offset, shared = item
    cleaned, quarantine = folder / f"cleaned-{i:05d}.arrow", folder / f"quarantine-{i:05d}.parquet"
    writer = CleanWriter(spec, source, shared, cleaned, quarantine)
    try:
        for frame in file_batches(source, i, spec, batch_rows):
            writer.add(offset, frame)
            offset += len(frame)
    finally:
        writer.close()
    return CleanedPart(i, writer.ledgers, writer.used, writer.tops, cleaned if writer.cleaned else None, quarantine)


def partitions(first: FirstPass) -> list[tuple[int, int, np.ndarray]]:
    """(file index, first row in the whole table, shared-id positions within the file) for every file."""
    if sum(first.file_rows) != first.fingerprint["rows"] or len(first.file_rows) != len(first.source.paths):
        raise ValueError("the first pass did not count the rows of every file; cannot place the partitions")
    bounds = np.concatenate([[0], np.cumsum(first.file_rows, dtype=np.int64)])
    cut = np.searchsorted(first.shared, bounds)
    return [(i, int(bounds[i]), first.shared[cut[i]: cut[i + 1]]) for i in range(len(first.file_rows))]


def _append_cleaned(parts: list[CleanedPart], path: Path, batch_rows: int) -> None:
    # Appended in file order, each batch cast to the first part's types (as the stream casts every batch to the
    # first batch's); the parts' mapped pages are handed back batch by batch.
    writer = schema = None
    try:
        for part in parts:
            if part.cleaned is None:
                continue
            mapped = MappedFile(part.cleaned)
            table = pa.ipc.open_file(pa.BufferReader(pa.py_buffer(mapped.map))).read_all()
            if writer is None:
                schema = table.schema
                writer = pa.ipc.new_file(str(path), schema)
            for batch in table.to_batches(max_chunksize=batch_rows):
                writer.write_table(pa.Table.from_batches([batch]).cast(schema))
                mapped.release()
            del table
            del batch, mapped  # the mapping goes with the last buffer that points into it
            part.cleaned.unlink()
    finally:
        if writer is not None:
            writer.close()


def _append_quarantine(parts: list[CleanedPart], path: Path, batch_rows: int) -> None:
    writer = None
    try:
        for part in parts:
            reader = pq.ParquetFile(part.quarantine)
            if writer is None:
                writer = pq.ParquetWriter(path, reader.schema_arrow)
            for batch in reader.iter_batches(batch_size=batch_rows):
                writer.write_batch(batch)
            reader.close()
            part.quarantine.unlink()
    finally:
        if writer is not None:
            writer.close()


def stream_clean_parts(spec: Spec, folder: Path, first: FirstPass, mapper: Mapper,
                       batch_rows: int = BATCH_ROWS) -> StreamedTable:
    """:func:`stream_clean` with one file per piece of work run by ``mapper`` (e.g. on Dask workers), the parts
    then appended in file order: the same cleaned rows, quarantine, ledger and newest time as the stream gives.

    Raises InputError as :func:`stream_clean` does (a worker's InputError, or no row left).
    """
    tick = time.perf_counter()
    parts_folder = folder / PARTS
    parts_folder.mkdir(parents=True, exist_ok=True)
    work = partial(clean_file, spec=spec, source=first.source, folder=parts_folder, batch_rows=batch_rows)
    parts: list[CleanedPart] = list(mapper(work, partitions(first)))
    if [p.index for p in parts] != list(range(len(first.source.paths))):
        raise InputError("the partitions came back incomplete or out of order")
    cleaned_seconds = time.perf_counter() - tick
    tick = time.perf_counter()
    _append_cleaned(parts, folder / CLEANED, batch_rows)
    _append_quarantine(parts, folder / QUARANTINE, batch_rows)
    seconds = {"ids and fingerprint": first.seconds, "validate and clean": cleaned_seconds,
               MERGE: time.perf_counter() - tick}
    return finish_clean(spec, first, folder, [ledger for p in parts for ledger in p.ledgers],
                        sum(p.used for p in parts), [t for p in parts for t in p.tops], seconds)
