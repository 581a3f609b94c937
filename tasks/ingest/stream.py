"""Ingestion as a stream: a table of any length read, validated and cleaned batch by batch at bounded memory.

Two passes over the source, each holding one batch at a time:

1. **Ids and fingerprint.** Every id goes, with its row's position, to one of ``PARTITIONS`` Arrow files on disk
   chosen by a hash of the id; each partition is then small enough to find its shared ids in memory. What
   survives of it is the sorted positions of rows whose id is shared: no set of all ids is ever built. The
   fingerprint is fed here too.
2. **Validate, rules, model-readiness.** Each batch goes through :func:`validate_and_clean` (the same pandera
   schema and rules as a table read whole), told which of its rows share an id with any other row. Cleaned
   rows are appended to ``cleaned.arrow``, rejected ones with every reason to ``quarantine.parquet``, and the
   batch ledgers are summed; at the end ``rows in = used + quarantined`` is checked for the whole table.
"""

from __future__ import annotations

import mmap
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from entivec.schemas.ledger import Ledger
from entivec.schemas.spec import ROW_ID, Spec
from entivec.schemas.tables import parse_times
from entivec.schemas.vocabulary import category_strings
from entivec.tasks.ingest.clean import kept_folder, validate_and_clean
from entivec.tasks.ingest.common import KindTally
from entivec.tasks.ingest.fingerprint import StreamFingerprint
from entivec.tasks.ingest.read import (
    BOOKKEEPING,
    QUARANTINE_STEM,
    RAW_LINE,
    REASONS,
    SOURCE_FILE,
    SOURCE_ROW,
    InputError,
    SourceFiles,
    file_batches,
    source_files,
)
from entivec.tasks.ingest.workdir import size_on_disk

PARTITIONS = 64
CLEANED = "cleaned.arrow"  # Arrow IPC: written and read back fast, columns memory-mapped on demand
QUARANTINE = "quarantine.parquet"
BATCH_ROWS = 1 << 18  # about 262,000 rows: a few hundred MB of pandas at most


@dataclass
class StreamedTable:
    """Where a streamed ingestion left its rows, and what it found."""

    folder: Path
    ledger: Ledger
    fingerprint: dict
    files: list[str]
    duplicate_rows: int
    newest_time: object = None  # the newest time of the split's time column among the cleaned rows
    batches: int = 0
    seconds: dict[str, float] = field(default_factory=dict)
    data_columns: dict[str, str] = field(default_factory=dict)  # each column's kind as read (drift's schema check)

    @property
    def cleaned(self) -> Path:
        return self.folder / CLEANED

    @property
    def quarantine(self) -> Path:
        return self.folder / QUARANTINE

    def summary(self) -> list[str]:
        """One line per stage with its time and rows per second, then the working folder's size on disk."""
        rows = self.ledger.rows_in
        lines = [f"{stage}: {rows:,} rows in {seconds:.1f} s ({rows / seconds:,.0f} rows/s)"
                 for stage, seconds in self.seconds.items() if seconds > 0]
        lines.append(f"working set: {size_on_disk(self.folder) / 2**30:.2f} GiB on disk in {self.folder}")
        return lines


def batches(spec: Spec, source: SourceFiles, batch_rows: int) -> object:
    """(first row position in the whole table, batch) for every batch of every file, in read order."""
    offset = 0
    for i in range(len(source.paths)):
        for frame in file_batches(source, i, spec, batch_rows):
            yield offset, frame
            offset += len(frame)


def _id_partition(ids: pd.Series) -> np.ndarray:
    return (pd.util.hash_pandas_object(ids, index=False).to_numpy() % np.uint64(PARTITIONS)).astype(np.int64)


def shared_id_rows(spec: Spec, source: SourceFiles, folder: Path, batch_rows: int,
                   fingerprint: StreamFingerprint | None = None, observers: tuple = (), mapper=None) -> np.ndarray:
    """Sorted positions (in the whole table) of rows whose id another row shares; missing ids are left out.

    Ids are hash-partitioned to Arrow files under ``folder`` and each partition is checked on its own, here or by
    ``mapper`` (``tasks/ingest/partitioned.py``: e.g. on Dask workers that reach ``folder``). The fingerprint
    and every observer (anything with ``update(frame)``) see each raw batch as read.
    """
    folder.mkdir(parents=True, exist_ok=True)
    schema = pa.schema([("id", pa.string()), ("row", pa.int64())])
    writers: dict[int, pa.ipc.RecordBatchFileWriter] = {}
    try:
        for offset, frame in batches(spec, source, batch_rows):
            if fingerprint is not None:
                fingerprint.update(frame)
            for observer in observers:
                observer.update(frame)
            if spec.id_column is None:
                continue  # row numbers are unique by construction
            ids = category_strings(frame[spec.id_column])
            present = ids.notna().to_numpy()
            ids = ids[present]
            rows = offset + np.flatnonzero(present)
            part = _id_partition(ids)
            order = np.argsort(part, kind="stable")
            bounds = np.searchsorted(part[order], np.arange(PARTITIONS + 1))
            table = pa.table([pa.array(ids, pa.string()), pa.array(rows, pa.int64())], schema=schema).take(order)
            for p in range(PARTITIONS):
                if bounds[p + 1] == bounds[p]:
                    continue
                if p not in writers:
                    writers[p] = pa.ipc.new_file(str(folder / f"ids-{p:03d}.arrow"), schema)
                writers[p].write_table(table.slice(bounds[p], bounds[p + 1] - bounds[p]))
    finally:
        for writer in writers.values():
            writer.close()
    shared = list((mapper or _in_process)(shared_in_partition,
                                          [folder / f"ids-{p:03d}.arrow" for p in sorted(writers)]))
    return np.sort(np.concatenate(shared)) if shared else np.zeros(0, dtype=np.int64)


def _in_process(fn: object, items: list) -> list:
    return [fn(item) for item in items]


def shared_in_partition(path: Path) -> np.ndarray:
    """Positions of the rows of one id partition file whose id another row of it shares (every row with a given
    id is in the same partition); the file is removed. A piece of work a Dask worker can do."""
    with pa.memory_map(str(path)) as source_file:
        table = pa.ipc.open_file(source_file).read_all().to_pandas()
    repeated = table["id"].duplicated(keep=False).to_numpy()
    path.unlink()
    return table["row"].to_numpy()[repeated]


def _quarantine_schema(source: SourceFiles, spec: Spec) -> pa.Schema:
    # Values as read, as text: one type per column whatever each batch held.
    names = [*source.columns, *([ROW_ID] if spec.id_column is None else []), RAW_LINE]
    fields = [(REASONS, pa.string()), (SOURCE_FILE, pa.string()), (SOURCE_ROW, pa.int64())]
    fields += [(str(c), pa.string()) for c in names]
    return pa.schema(fields)


def quarantine_table(frame: pd.DataFrame, schema: pa.Schema) -> pa.Table:
    """A quarantine frame in the stream's fixed layout (every value as text)."""
    columns = {}
    for name in schema.names:
        if name == SOURCE_ROW:
            columns[name] = pa.array(frame[name].to_numpy(dtype=np.int64), pa.int64())
            continue
        values = frame[name] if name in frame.columns else pd.Series([None] * len(frame), dtype=object)
        text = values.astype("string")
        columns[name] = pa.array(text.to_numpy(dtype=object, na_value=None), pa.string())
    return pa.table(columns, schema=schema)


@dataclass
class FirstPass:
    """What the first pass over the source found: enough to decide whether the second pass is needed at all (a
    run whose data the latest version already has stops here)."""

    source: SourceFiles
    shared: np.ndarray
    fingerprint: dict
    data_columns: dict[str, str]
    seconds: float
    file_rows: list[int] = field(default_factory=list)  # rows read from each file, in the source's order


def first_pass(spec: Spec, spec_path: str | Path, folder: Path, batch_rows: int = BATCH_ROWS,
               observers: tuple = (), mapper=None) -> FirstPass:
    """Ids and fingerprint (pass 1): the rows whose id is shared, the data's fingerprint and each column's kind as
    read; ``observers`` (``update(frame)``) see every raw batch too, e.g. the review page's group tally.
    ``mapper``: where the id partitions are checked (default: here)."""
    source = source_files(spec, spec_path)
    fingerprint = StreamFingerprint(source.columns)
    kinds = KindTally()
    tick = time.perf_counter()
    shared = shared_id_rows(spec, source, folder / "ids", batch_rows, fingerprint, (kinds, *observers), mapper)
    file_rows = [fingerprint.per_file[n].rows if n in fingerprint.per_file else 0 for n in source.names]
    return FirstPass(source, shared, fingerprint.result(source.names), kinds.result(), time.perf_counter() - tick,
                     file_rows)


def newer(newest: object, top: object) -> object:
    """The newest time so far after a batch whose newest time is ``top`` (batches taken in read order)."""
    return top if newest is None or (pd.notna(top) and top > newest) else newest


class CleanWriter:
    """Validates and cleans batches in read order (:func:`validate_and_clean`, told which rows share an id),
    appending cleaned rows to one Arrow file and rejected rows with every reason to one Parquet file.

    The one per-batch code path: the single-process stream feeds it every batch of the table, a Dask worker the
    batches of one file (``tasks/ingest/partitioned.py``); what it keeps per batch (ledgers, newest times) is
    summed by the caller in batch order, so both give the same table.
    """

    def __init__(self, spec: Spec, source: SourceFiles, shared: np.ndarray, cleaned: Path, quarantine: Path) -> None:
        self.spec, self.source, self.shared, self.cleaned_path = spec, source, shared, cleaned
        self.q_schema = _quarantine_schema(source, spec)
        self.quarantine = pq.ParquetWriter(quarantine, self.q_schema)
        self.cleaned: pa.ipc.RecordBatchFileWriter | None = None
        self.schema: pa.Schema | None = None
        self.ledgers: list[Ledger] = []
        self.tops: list[object] = []  # each batch's newest time (split.time_column) among its cleaned rows
        self.used = 0

    def add(self, offset: int, frame: pd.DataFrame) -> None:
        """Clean one batch whose first row is at ``offset`` in the whole table."""
        lo, hi = np.searchsorted(self.shared, [offset, offset + len(frame)])
        result = validate_and_clean(frame, self.spec, self.source.names, duplicates=self.shared[lo:hi] - offset,
                                    first_row_id=offset + 1, allow_empty=True)
        self.ledgers.append(result.ledger)
        if len(result.quarantine):
            self.quarantine.write_table(quarantine_table(result.quarantine, self.q_schema))
        if not len(result.frame):
            return
        typed = result.frame
        table = pa.Table.from_pandas(typed, preserve_index=False)
        if self.cleaned is None:
            self.schema = table.schema
            self.cleaned = pa.ipc.new_file(str(self.cleaned_path), self.schema)
        else:
            table = table.cast(self.schema)
        self.cleaned.write_table(table)
        self.used += table.num_rows
        if self.spec.split.time_column:
            self.tops.append(parse_times(typed[self.spec.split.time_column]).max())

    def close(self) -> None:
        for writer in (self.cleaned, self.quarantine):
            if writer is not None:
                writer.close()


def stream_clean(spec: Spec, spec_path: str | Path, folder: Path, batch_rows: int = BATCH_ROWS,
                 first: FirstPass | None = None) -> StreamedTable:
    """Read, validate and clean the spec's source batch by batch into ``folder`` (see the module's docstring);
    ``first``: the first pass, when the caller made it already.

    Raises InputError for file-level faults and when no row survives (the quarantine file stays in ``folder``
    for the caller to keep), as the whole-table path does.
    """
    first = first or first_pass(spec, spec_path, folder, batch_rows)
    tick = time.perf_counter()
    writer = CleanWriter(spec, first.source, first.shared, folder / CLEANED, folder / QUARANTINE)
    try:
        for offset, frame in batches(spec, first.source, batch_rows):
            writer.add(offset, frame)
    finally:
        writer.close()
    return finish_clean(spec, first, folder, writer.ledgers, writer.used, writer.tops,
                        {"ids and fingerprint": first.seconds, "validate and clean": time.perf_counter() - tick})


def finish_clean(spec: Spec, first: FirstPass, folder: Path, ledgers: list[Ledger], used: int, tops: list[object],
                 seconds: dict[str, float]) -> StreamedTable:
    """The batch ledgers summed in read order and checked (rows in = used + quarantined), the newest time; raises
    InputError when no row survives."""
    source = first.source
    ledger = Ledger(rows_in=0, files=source.names)
    for part in ledgers:
        ledger.add(part)
    newest = None
    for top in tops:
        newest = newer(newest, top)
    quarantined = pq.ParquetFile(folder / QUARANTINE).metadata.num_rows
    ledger.check(used, quarantined)
    if used == 0:
        top = sorted(ledger.quarantined_by_reason().items(), key=lambda kv: -kv[1])[:5]
        summary = ", ".join(f"{reason} ({rows})" for reason, rows in top)
        raise InputError(f"{', '.join(source.names)}: all {ledger.rows_in} row(s) were quarantined; most common "
                         f"reasons: {summary}", ledger=ledger)
    return StreamedTable(folder, ledger, first.fingerprint, source.names, len(first.shared), newest, len(ledgers),
                         seconds, first.data_columns)


class MappedFile:
    """A file memory-mapped read-only whose pages can be handed back: pages read through a mapping count as the
    process's resident memory until then, so a pass over a large file would otherwise grow with the file."""

    def __init__(self, path: Path) -> None:
        with open(path, "rb") as handle:
            self.map = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)

    def release(self) -> None:
        if hasattr(mmap, "MADV_DONTNEED"):
            self.map.madvise(mmap.MADV_DONTNEED)


def cleaned_table(path: Path, mapped: MappedFile | None = None) -> pa.Table:
    """The cleaned rows as an Arrow table over the memory-mapped file: columns are read when used."""
    mapped = mapped or MappedFile(path)
    return pa.ipc.open_file(pa.BufferReader(pa.py_buffer(mapped.map))).read_all()


def cleaned_column(path: Path, name: str) -> np.ndarray:
    """One column of the cleaned rows as a numpy array (a copy; the mapped pages are handed back)."""
    mapped = MappedFile(path)
    values = cleaned_table(path, mapped).column(name).to_numpy()
    mapped.release()
    return values


def read_cleaned(path: Path, columns: list[str] | None = None, batch_rows: int = BATCH_ROWS) -> object:
    """The cleaned rows back, batch by batch, as pandas frames; each batch's mapped pages are handed back."""
    mapped = MappedFile(path)
    table = cleaned_table(path, mapped)
    if columns is not None:
        table = table.select(columns)
    for batch in table.to_batches(max_chunksize=batch_rows):
        frame = batch.to_pandas()
        mapped.release()
        yield frame


TAKE_ROWS = 2_048  # rows fetched by position between two hand-backs of the mapped pages


def cleaned_rows(path: Path, positions: np.ndarray) -> pd.DataFrame:
    """The cleaned rows at ``positions`` (in the cleaned table's order) as one pandas frame, in that order: for a
    bounded sample; only the pages holding those rows are read.

    Taken record batch by record batch (Arrow's take on a whole chunked column joins its chunks into one array
    first: a copy of the column, 2.4 GiB more at 10 M rows, measured), at most ``TAKE_ROWS`` positions at a time
    with the mapped pages handed back after each: rows from random places touch a page per row and column.
    """
    mapped = MappedFile(path)
    table = cleaned_table(path, mapped)
    at = np.asarray(positions, dtype=np.int64)
    batches = table.to_batches()
    starts = np.cumsum([0] + [b.num_rows for b in batches])
    order = np.argsort(at, kind="stable")
    ordered = at[order]
    which = np.searchsorted(starts, ordered, side="right") - 1
    parts = []
    for b in np.unique(which):
        inside = ordered[which == b] - starts[b]
        for start in range(0, len(inside), TAKE_ROWS):  # a copy each: no longer the mapped pages
            parts.append(pa.Table.from_batches([batches[b].take(pa.array(inside[start:start + TAKE_ROWS]))]))
            mapped.release()
    taken = pa.concat_tables(parts) if parts else table.slice(0, 0)
    if len(at) and not np.array_equal(order, np.arange(len(at))):  # back to the order asked for (a sample's size)
        back = np.empty_like(order)
        back[order] = np.arange(len(order))
        taken = taken.take(pa.array(back))
    frame = taken.to_pandas()
    mapped.release()
    return frame


def quarantine_rows(quarantine: pd.DataFrame | Path) -> int:
    """Rows of a quarantine held as a frame or written by a streamed run (``quarantine.parquet``)."""
    if isinstance(quarantine, pd.DataFrame):
        return len(quarantine)
    return pq.ParquetFile(quarantine).metadata.num_rows


def write_quarantine_file(source: Path, folder: str | Path, batch_rows: int = 1 << 16) -> Path:
    """:func:`write_quarantine` for a streamed run's ``quarantine.parquet``: copied batch by batch (reasons and the
    row's origin first) as Parquet and CSV, so a large quarantine is never one frame in memory."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    reader = pq.ParquetFile(source)
    names = reader.schema_arrow.names
    front = [c for c in (REASONS, *BOOKKEEPING) if c in names]
    order = front + [c for c in names if c not in front]
    parquet_path = folder / f"{QUARANTINE_STEM}.parquet"
    csv_path = folder / f"{QUARANTINE_STEM}.csv"
    writer = None
    try:
        for i, batch in enumerate(reader.iter_batches(batch_size=batch_rows, columns=order)):
            if writer is None:
                writer = pq.ParquetWriter(parquet_path, batch.schema)
            writer.write_batch(batch)
            batch.to_pandas().to_csv(csv_path, index=False, header=i == 0, mode="w" if i == 0 else "a")
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        pq.write_table(reader.schema_arrow.empty_table().select(order), parquet_path)
        pd.DataFrame(columns=order).to_csv(csv_path, index=False)
    return parquet_path


def keep_quarantine(quarantine: Path, name: str, keep_in: str | Path) -> Path:
    """Write the quarantine of a streamed run that stops under ``keep_in``/``NAME-STAMP``; returns the Parquet
    file (the working set it came from is removed with the run)."""
    return write_quarantine_file(quarantine, kept_folder(name, keep_in))
