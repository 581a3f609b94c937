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

:meth:`WorkingSet.blocks` reads the training arrays back as blocks of pieces from random places, shuffled
inside each block, releasing the pages after each block, so memory stays at one block.
"""

from __future__ import annotations

import math
import mmap
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.schemas.spec import Spec
from entivec.schemas.tables import parse_times
from entivec.schemas.vocabulary import Vocabulary, category_strings
from entivec.tasks.ingest.read import InputError
from entivec.tasks.ingest.split import rolling_cutoff, test_mask
from entivec.tasks.ingest.stream import (
    BATCH_ROWS,
    CLEANED,
    StreamedTable,
    cleaned_column,
    cleaned_rows,
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
        out = (EncodedInputs(np.take(ids, at, axis=0).astype(np.int64), np.take(dense, at, axis=0)),
               np.take(y, at).astype(np.float64))
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


def build_working_set(
    streamed: StreamedTable, spec: Spec, previous: dict[str, Vocabulary] | None = None,
    batch_rows: int = BATCH_ROWS,
) -> tuple[WorkingSet, dict[str, Vocabulary], FeatureEncoder]:
    """Split, count, fit the encoder and encode the cleaned rows of ``streamed`` into its folder."""
    cutoff = rolling_cutoff(pd.Series([streamed.newest_time]), spec.split) if spec.split.last_weeks else None
    drawn = random_test_rows(streamed.ledger.rows_used, spec) if spec.split.method == "random" else None
    previous = previous or {}
    counts = {c: pd.Series(dtype=np.int64) for c in spec.embed_names}
    missing = dict.fromkeys(spec.embed_names, 0)
    levels: dict[str, set[str]] = {c: set() for c in spec.onehot_names}
    is_test = np.zeros(0, dtype=bool)
    parts = []
    seen = 0
    for frame in read_cleaned(streamed.cleaned, batch_rows=batch_rows):
        test = drawn[seen: seen + len(frame)] if drawn is not None else _split_mask(frame, spec, cutoff)
        seen += len(frame)
        parts.append(test)
        train = frame[~test]
        for c in spec.embed_names:
            strings = category_strings(train[c])
            counts[c] = counts[c].add(strings.value_counts(dropna=True), fill_value=0)
            missing[c] += int(strings.isna().sum())
        for c in spec.onehot_names:
            levels[c].update(str(v) for v in category_strings(train[c]).dropna().unique())
    is_test = np.concatenate(parts) if parts else is_test
    del drawn, parts
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
    out = {p: (_open(ws.path(p, "ids"), (ws.rows[p], k), "int32"), _open(ws.path(p, "dense"), (ws.rows[p], d),
                                                                         "float32"),
               _open(ws.path(p, "y"), (ws.rows[p],), "float64")) for p in PARTS}
    at = dict.fromkeys(PARTS, 0)
    seen = 0
    target = spec.target.column
    for frame in read_cleaned(streamed.cleaned, batch_rows=batch_rows):
        test = is_test[seen: seen + len(frame)]
        seen += len(frame)
        for part, rows in (("train", frame[~test]), ("test", frame[test])):
            if not len(rows):
                continue
            encoded = encoder.transform(rows)
            y = rows[target].to_numpy(dtype=np.float64)
            if part == "train":
                y = targets.forward(y, spec.target.transform)
            ids, dense, yy = out[part]
            lo, hi = at[part], at[part] + len(rows)
            ids[lo:hi] = encoded.cat_ids
            dense[lo:hi] = encoded.dense
            yy[lo:hi] = y
            at[part] = hi
            for array in out[part]:
                array.flush()
                release(array)
    for arrays in out.values():
        for array in arrays:
            array.flush()
            del array
    return ws, vocabularies, encoder
