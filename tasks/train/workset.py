"""The encoded working set of a streamed run: int32 ids and float32 inputs as memory-mapped ``.npy`` files.

Built from the cleaned rows a streamed ingestion wrote (``tasks/ingest/stream.py``), one batch at a time:

1. **Split and count.** Each batch is split (``hash`` or ``time``: the side of a row depends on that row alone;
   ``random``: the seeded permutation a table read whole gets, drawn once over the row count),
   and the categories of its training rows are counted; summed counts give the vocabularies
   (``Vocabulary.from_counts``: the same ids as a table read whole). One-hot levels are collected the same way.
2. **Numeric statistics.** Per numeric column, its training values are read as one column (8 bytes a row, the
   largest array the run holds) and given to the encoder's own functions, so medians and standardisation equal
   those of a table read whole.
3. **Encode.** Each batch is encoded by the fitted :class:`FeatureEncoder` and written into preallocated
   memory-mapped arrays, training rows and held-out rows apart.

Counting and encoding take ranges of cleaned rows, one piece of work each, run here or on Dask workers that reach
the run's folder (``tasks/ingest/partitioned.py``'s ``Mapper``); only the sums come back.

:meth:`WorkingSet.blocks` reads the training arrays back as blocks of pieces from random places, shuffled
inside each block, releasing the pages after each block, so memory stays at one block.
"""

from __future__ import annotations

import math
import mmap
from collections.abc import Iterator
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.schemas.spec import Spec
from entivec.schemas.tables import parse_times
from entivec.schemas.vocabulary import Vocabulary, category_strings
from entivec.tasks.ingest.partitioned import Mapper, in_process
from entivec.tasks.ingest.read import InputError
from entivec.tasks.ingest.split import rolling_cutoff, test_mask
from entivec.tasks.ingest.stream import (
    BATCH_ROWS,
    CLEANED,
    MappedFile,
    StreamedTable,
    cleaned_column,
    cleaned_rows,
    cleaned_table,
    read_cleaned,
)
from entivec.tasks.train import targets
from entivec.tasks.train.encoder import EncodedInputs, FeatureEncoder, numeric_stats

PARTS = ("train", "test")


def _open(path: Path, shape: tuple[int, ...], dtype: str) -> np.memmap:
    return np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=shape)


def release(array: np.ndarray) -> None:
    # Give back the pages of a memory-mapped array read so far: they count as the process's resident memory.
    handle = getattr(array, "_mmap", None)
    if handle is not None and hasattr(mmap, "MADV_DONTNEED"):
        handle.madvise(mmap.MADV_DONTNEED)


TAKE_ROWS = 16_384  # rows gathered by position from a memory map between two hand-backs of its pages


def take_rows(array: np.ndarray, at: np.ndarray, rows: int = TAKE_ROWS) -> np.ndarray:
    """``np.take(array, at, axis=0)`` of a memory-mapped array, ``rows`` positions at a time with the pages handed
    back after each: a sample from random places touches a page per row, so 250,000 rows of a 100 M-row array
    would otherwise hold up to 1 GiB of its pages at once."""
    at = np.asarray(at, dtype=np.int64)
    out = np.empty((len(at), *array.shape[1:]), dtype=array.dtype)
    for start in range(0, len(at), rows):
        out[start:start + rows] = np.take(array, at[start:start + rows], axis=0)
        release(array)
    return out


IS_TEST = "is-test.npy"  # per cleaned row, in the cleaned table's order: held out (True) or training (False)


def part_positions(is_test: np.ndarray, test: bool, at: np.ndarray, block_rows: int = BATCH_ROWS) -> np.ndarray:
    """Where the rows ``at`` of one part (``test``: the held-out part) sit among all rows flagged by ``is_test``,
    in the order of ``at``; ``is_test`` is read ``block_rows`` at a time (a memory map's pages handed back)."""
    at = np.asarray(at, dtype=np.int64)
    order = np.argsort(at, kind="stable")
    wanted = at[order]
    found = np.empty(len(at), dtype=np.int64)
    seen = done = 0  # rows of the part before the block; entries of ``wanted`` placed
    for start in range(0, len(is_test), block_rows):
        block = np.asarray(is_test[start: start + block_rows], dtype=bool)
        where = np.flatnonzero(block if test else ~block)
        upto = int(np.searchsorted(wanted, seen + len(where), side="left"))
        found[done:upto] = start + where[wanted[done:upto] - seen]
        done, seen = upto, seen + len(where)
        release(is_test)
    if done < len(wanted) or (len(wanted) and wanted[0] < 0):
        raise IndexError(f"row positions outside the part's {seen} rows")
    out = np.empty_like(found)
    out[order] = found
    return out


@dataclass
class WorkingSet:
    folder: Path
    embed_columns: list[str]
    dense_names: list[str]
    rows: dict[str, int]

    def path(self, part: str, what: str) -> Path:
        return self.folder / f"{part}-{what}.npy"

    def positions(self, part: str, at: np.ndarray, block_rows: int = BATCH_ROWS) -> np.ndarray:
        """Positions in the cleaned table of the part's rows ``at`` (positions within the part), found block by
        block of the split flags: the positions of every row of a part would be 8 bytes a row."""
        return part_positions(np.load(self.folder / IS_TEST, mmap_mode="r"), part == "test", at, block_rows)

    def take(self, part: str, at: np.ndarray) -> tuple[EncodedInputs, np.ndarray]:
        """The encoded rows ``at`` of ``part`` (a bounded sample) in memory, as the in-memory trainer takes them."""
        ids, dense, y = self.arrays(part)
        at = np.asarray(at, dtype=np.int64)
        out = (EncodedInputs(take_rows(ids, at).astype(np.int64), take_rows(dense, at)),
               take_rows(y, at).astype(np.float64))
        for array in (ids, dense, y):
            release(array)
        return out

    def frame(self, part: str, at: np.ndarray) -> pd.DataFrame:
        """The cleaned rows ``at`` of ``part`` (positions within the part, sorted) as a pandas frame: for a bounded
        sample, e.g. the downstream models' rows."""
        return cleaned_rows(self.folder / CLEANED, self.positions(part, at))

    def frames(self, part: str, columns: list[str], batch_rows: int = BATCH_ROWS) -> Iterator[pd.DataFrame]:
        """The part's cleaned rows in order, batch by batch, only ``columns``."""
        is_test = np.load(self.folder / IS_TEST, mmap_mode="r")
        seen = 0
        for frame in read_cleaned(self.folder / CLEANED, columns, batch_rows):
            mask = np.asarray(is_test[seen: seen + len(frame)])
            seen += len(frame)
            release(is_test)
            yield frame[mask if part == "test" else ~mask]

    def part_blocks(self, part: str, block_rows: int) -> Iterator[tuple[EncodedInputs, np.ndarray]]:
        """The part's rows in order, block by block, each block's pages handed back after it."""
        ids, dense, y = self.arrays(part)
        for start in range(0, len(y), block_rows):
            stop = start + block_rows
            block = (EncodedInputs(np.asarray(ids[start:stop], dtype=np.int64), np.array(dense[start:stop])),
                     np.array(y[start:stop], dtype=np.float64))
            for array in (ids, dense, y):
                release(array)
            yield block

    def arrays(self, part: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(ids int32 (n, k), dense float32 (n, d), y float32 (n,)) of ``part``, memory-mapped read-only."""
        return tuple(np.load(self.path(part, w), mmap_mode="r", allow_pickle=False) for w in ("ids", "dense", "y"))

    def inputs(self, part: str) -> tuple[EncodedInputs, np.ndarray]:
        """The part's rows in memory, as the in-memory trainer takes them (for a table that fits)."""
        ids, dense, y = self.arrays(part)
        return EncodedInputs(np.asarray(ids, dtype=np.int64), np.array(dense)), np.array(y, dtype=np.float64)

    def blocks(
        self, part: str, block_rows: int, seed: int, exclude: np.ndarray | None = None, mix: int = 16
    ) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """One pass over ``part`` in blocks of about ``block_rows`` rows, each made of ``mix`` pieces from random
        places of the arrays (a seeded order of pieces), its rows shuffled together; rows at the sorted
        positions ``exclude`` are left out.

        Mixing pieces matters when the rows were written in an order that means something (sorted by time,
        by price, by file): a block of neighbouring rows alone would give batches far from a random sample.
        """
        ids, dense, y = self.arrays(part)
        exclude = np.zeros(0, dtype=np.int64) if exclude is None else np.asarray(exclude, dtype=np.int64)
        n = len(y)
        rng = np.random.default_rng(seed)
        piece = max(1, block_rows // max(1, mix))
        starts = rng.permutation(np.arange(0, n, piece))
        for g in range(0, len(starts), mix):
            group = np.sort(starts[g: g + mix])
            positions = np.concatenate([np.arange(s, min(s + piece, n)) for s in group])
            if len(exclude):
                at = np.minimum(np.searchsorted(exclude, positions), len(exclude) - 1)
                positions = positions[exclude[at] != positions]
            positions = positions[rng.permutation(len(positions))]
            block = (np.take(ids, positions, axis=0), np.take(dense, positions, axis=0), np.take(y, positions))
            for array in (ids, dense, y):
                release(array)
            yield block

    def bytes_on_disk(self) -> int:
        return sum(self.path(p, w).stat().st_size for p in PARTS for w in ("ids", "dense", "y"))


def _split_mask(frame: pd.DataFrame, spec: Spec, cutoff: object) -> np.ndarray:
    return test_mask(frame, spec.split, spec.id_name, cutoff)


def random_test_rows(n: int, spec: Spec) -> np.ndarray:
    """Which of ``n`` cleaned rows a ``random`` split holds out: the same rows as ``split_rows`` picks on the table
    read whole (the same seeded permutation, its first ceil(n * test_fraction) rows).

    The permutation is drawn over int32 positions (4 bytes a row, freed once the mask is made): numpy's shuffle
    makes the same swaps whatever the element type, so the order equals ``default_rng(seed).permutation(n)``.
    """
    if n < 2:
        raise InputError(f"cannot split {n} row(s) into a train and a test part; at least 2 are needed")
    n_test = min(max(math.ceil(n * spec.split.test_fraction), 1), n - 1)
    order = np.arange(n, dtype=np.int32 if n < 2**31 else np.int64)
    np.random.default_rng(spec.split.seed).shuffle(order)
    is_test = np.zeros(n, dtype=bool)
    is_test[order[:n_test]] = True
    return is_test


def _empty_part(streamed: StreamedTable, spec: Spec, n_train: int, cutoff: object, batch_rows: int) -> InputError:
    """The error ``split_rows`` gives when a split leaves a part empty, worded the same for a streamed table."""
    split, n = spec.split, streamed.ledger.rows_used
    if split.method != "time":
        return InputError(f"hash split of {n} row(s) with test_fraction {split.test_fraction} leaves one part "
                          f"empty; use more rows or another split.test_fraction")
    low = high = None
    for frame in read_cleaned(streamed.cleaned, [split.time_column], batch_rows):
        times = parse_times(frame[split.time_column]).dropna()
        if len(times):
            low = times.min() if low is None else min(low, times.min())
            high = times.max() if high is None else max(high, times.max())
    side = "train" if n_train == 0 else "test"
    at = (f"cutoff {split.cutoff!r} (spec key split.cutoff)" if split.last_weeks is None
          else f"the last {split.last_weeks} week(s), from {cutoff} (spec key split.last_weeks)")
    return InputError(f"time split on column {split.time_column!r} at {at} leaves the {side} part empty: times run "
                      f"from {low} to {high}")


@dataclass
class CountedRange:
    """What counting one range of cleaned rows found: which are held out, and its training rows' categories."""

    is_test: np.ndarray
    counts: dict[str, pd.Series]
    missing: dict[str, int]
    levels: dict[str, set[str]]


def row_ranges(n: int, rows: int) -> list[tuple[int, int]]:
    """[start, stop) ranges of at most ``rows`` cleaned rows covering ``n`` rows in order."""
    return [(lo, min(lo + rows, n)) for lo in range(0, n, rows)]


def _cleaned_range(cleaned: Path, lo: int, hi: int, columns: list[str] | None = None) -> pd.DataFrame:
    mapped = MappedFile(cleaned)
    table = cleaned_table(cleaned, mapped).slice(lo, hi - lo)
    frame = (table.select(columns) if columns is not None else table).to_pandas()
    mapped.release()
    return frame


def count_range(item: tuple[int, int, np.ndarray | None], *, cleaned: Path, spec: Spec,
                cutoff: object) -> CountedRange:
    """Split cleaned rows [lo, hi) (``drawn``: their side when the split was drawn over the whole table) and count
    the categories and one-hot levels of their training rows."""
    lo, hi, drawn = item
    frame = _cleaned_range(cleaned, lo, hi)
    test = np.asarray(drawn) if drawn is not None else _split_mask(frame, spec, cutoff)
    train = frame[~test]
    counts, missing, levels = {}, {}, {}
    for c in spec.embed_names:
        strings = category_strings(train[c])
        counts[c] = strings.value_counts(dropna=True)
        missing[c] = int(strings.isna().sum())
    for c in spec.onehot_names:
        levels[c] = {str(v) for v in category_strings(train[c]).dropna().unique()}
    return CountedRange(test, counts, missing, levels)


def _header_bytes(path: Path) -> int:
    array = np.load(path, mmap_mode="r")
    offset = array.offset
    del array
    return offset


def encode_range(item: tuple[int, int, np.ndarray, int, int], *, cleaned: Path, spec: Spec, encoder: FeatureEncoder,
                 ws: WorkingSet) -> int:
    """Encode cleaned rows [lo, hi) (``test``: which are held out) into the working set's preallocated arrays at
    rows ``at_train`` and ``at_test`` of each part; returns the rows written.

    Written with plain positioned file writes of whole rows, not through a shared memory map: several processes,
    on one machine or over a shared file system, each write their own byte range, and no page is ever shared.
    """
    lo, hi, test, at_train, at_test = item
    frame = _cleaned_range(cleaned, lo, hi)
    target = spec.target.column
    for part, rows, at in (("train", frame[~test], at_train), ("test", frame[test], at_test)):
        if not len(rows):
            continue
        encoded = encoder.transform(rows)
        y = rows[target].to_numpy(dtype=np.float64)
        if part == "train":
            y = targets.forward(y, spec.target.transform)
        values = (encoded.cat_ids.astype(np.int32), encoded.dense.astype(np.float32), y.astype(np.float64))
        for what, block in zip(("ids", "dense", "y"), values, strict=True):
            path = ws.path(part, what)
            row_bytes = block.itemsize * int(np.prod(block.shape[1:], dtype=np.int64))
            with open(path, "r+b") as handle:
                handle.seek(_header_bytes(path) + at * row_bytes)
                handle.write(np.ascontiguousarray(block).tobytes())
    return len(frame)


def build_working_set(
    streamed: StreamedTable, spec: Spec, previous: dict[str, Vocabulary] | None = None,
    batch_rows: int = BATCH_ROWS, mapper: Mapper = in_process,
) -> tuple[WorkingSet, dict[str, Vocabulary], FeatureEncoder]:
    """Split, count, fit the encoder and encode the cleaned rows of ``streamed`` into its folder.

    Counting and encoding are done per range of ``batch_rows`` cleaned rows by ``mapper`` (here, or on Dask
    workers that reach the folder); counts are summed and ranges placed in row order, so the result does not
    depend on where the ranges ran. The numeric statistics (medians) need a whole column and stay here.
    """
    cutoff = rolling_cutoff(pd.Series([streamed.newest_time]), spec.split) if spec.split.last_weeks else None
    n = streamed.ledger.rows_used
    drawn = random_test_rows(n, spec) if spec.split.method == "random" else None
    previous = previous or {}
    ranges = row_ranges(n, batch_rows)
    items = [(lo, hi, None if drawn is None else drawn[lo:hi]) for lo, hi in ranges]
    del drawn
    counted = mapper(partial(count_range, cleaned=streamed.cleaned, spec=spec, cutoff=cutoff), items)
    del items
    counts = {c: pd.Series(dtype=np.int64) for c in spec.embed_names}
    missing = dict.fromkeys(spec.embed_names, 0)
    levels: dict[str, set[str]] = {c: set() for c in spec.onehot_names}
    flags = []
    for part in counted:  # summed as they come, so one range's counts are held at a time
        flags.append(part.is_test)
        for c in spec.embed_names:
            counts[c] = counts[c].add(part.counts[c], fill_value=0)
            missing[c] += part.missing[c]
        for c in spec.onehot_names:
            levels[c].update(part.levels[c])
    is_test = np.concatenate(flags) if flags else np.zeros(0, dtype=bool)
    del counted, flags
    n_train, n_test = int((~is_test).sum()), int(is_test.sum())
    if n_train == 0 or n_test == 0:
        raise _empty_part(streamed, spec, n_train, cutoff, batch_rows)
    vocabularies = {
        col.name: Vocabulary.from_counts(col.name, counts[col.name], n_train, missing[col.name], col.min_count,
                                         previous.get(col.name))
        for col in spec.columns.embed
    }
    stats = []
    for col in spec.columns.numeric:
        # One column of training values at a time (8 bytes a row): the largest array a streamed run holds.
        values = np.asarray(cleaned_column(streamed.cleaned, col.name), dtype=np.float64)[~is_test]
        stats.append(numeric_stats(values, col))
        del values
    encoder = FeatureEncoder.from_stats(spec, vocabularies, stats, {c: sorted(v) for c, v in levels.items()})

    folder = streamed.folder
    np.save(folder / IS_TEST, is_test)
    ws = WorkingSet(folder, list(spec.embed_names), encoder.dense_names, {"train": n_train, "test": n_test})
    k, d = len(spec.embed_names), len(encoder.dense_names)
    # Targets in float64, as the in-memory path keeps them: a table that fits trains on the very same numbers.
    for p in PARTS:  # preallocated here; the ranges write into them
        for what, shape, dtype in (("ids", (ws.rows[p], k), "int32"), ("dense", (ws.rows[p], d), "float32"),
                                   ("y", (ws.rows[p],), "float64")):
            array = _open(ws.path(p, what), shape, dtype)
            array.flush()
            del array
    held = np.concatenate([[0], np.cumsum(is_test, dtype=np.int64)])
    items = [(lo, hi, is_test[lo:hi], int(lo - held[lo]), int(held[lo])) for lo, hi in ranges]
    written = sum(mapper(partial(encode_range, cleaned=streamed.cleaned, spec=spec, encoder=encoder, ws=ws), items))
    if written != n:
        raise RuntimeError(f"encoding wrote {written} of {n} cleaned rows")
    return ws, vocabularies, encoder
