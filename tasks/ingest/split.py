"""Splitting the cleaned rows into training and held-out rows, at random or by time.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import (
    SpecError,
    SplitSpec,
)
from entivec.schemas.tables import (
    parse_times,
)
from entivec.schemas.vocabulary import category_strings
from entivec.tasks.ingest.clean import examples, with_bookkeeping
from entivec.tasks.ingest.read import InputError, number_or_none, timestamp_or_none

# --- split ------------------------------------------------------------------------------------------------------


def rolling_cutoff(times: pd.Series, split: SplitSpec) -> pd.Timestamp:
    """The moment ``last_weeks`` weeks before the newest time in ``times`` (UTC timestamps)."""
    if pd.api.types.is_numeric_dtype(times.dtype):
        raise SpecError(
            f"spec: key 'split.last_weeks' needs dates or times, but time column {split.time_column!r} holds numbers; "
            f"use split.cutoff with a number instead"
        )
    return times.max() - pd.Timedelta(weeks=int(split.last_weeks))


def _cutoff_for(times: pd.Series, split: SplitSpec) -> Any:
    if split.last_weeks is not None:
        return rolling_cutoff(times, split)
    cutoff = split.cutoff
    if pd.api.types.is_numeric_dtype(times.dtype):
        number = number_or_none(cutoff)
        if number is None:
            raise SpecError(
                f"spec: key 'split.cutoff' is {cutoff!r}, but time column {split.time_column!r} holds numbers "
                f"(e.g. {times.dropna().iloc[0] if times.notna().any() else 'none'}); give a number"
            )
        return number
    stamp = timestamp_or_none(cutoff)
    if stamp is None:
        raise SpecError(f"spec: key 'split.cutoff' is {cutoff!r}, which cannot be read as a time")
    return stamp


def hash_is_test(ids: pd.Series, fraction: float, seed: int) -> np.ndarray:
    """True for the ids whose seeded hash falls in the lowest ``fraction`` of the 64-bit range.

    The hash is pandas' SipHash-2-4 of the id text (``hash_pandas_object``) keyed by the seed, so the side of an
    id depends on nothing but the id, the seed and the fraction.
    """
    key = f"entivec{int(seed) & 0xFFFFFFFF:09d}"[:16].ljust(16, "0")
    text = category_strings(ids).fillna("")
    hashes = pd.util.hash_pandas_object(text, index=False, hash_key=key).to_numpy()
    return (hashes >> np.uint64(11)).astype(np.float64) * 2.0**-53 < fraction


def test_mask(frame: pd.DataFrame, split: SplitSpec, id_column: str | None, cutoff: Any = None) -> np.ndarray:
    """Which rows are held out, for the ``hash`` and ``time`` methods (row by row; ``cutoff`` overrides the
    spec's, for a rolling window whose newest time is known beforehand)."""
    if split.method == "hash":
        if id_column is None or id_column not in frame.columns:
            raise InputError(f"hash split: the id column {id_column!r} is not in the table")
        return hash_is_test(frame[id_column], split.test_fraction, split.seed)
    times = parse_times(frame[split.time_column])
    return (times >= (cutoff if cutoff is not None else _cutoff_for(times, split))).to_numpy(dtype=bool)


def split_rows(
    frame: pd.DataFrame, split: SplitSpec, id_column: str | None = None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(train, test). Both keep the input's row order; index reset.

    - ``random``: a permutation drawn from ``numpy.random.default_rng(seed)`` picks ceil(n * test_fraction)
      test rows (the rounding scikit-learn's train_test_split uses), at least 1 and at most n - 1.
      The same rows in the same order with the same seed always give the same split.
    - ``time``: rows whose time is at or after ``cutoff`` are test. Text times are read as UTC (see
      ``parse_times``); a numeric time column (e.g. a year) is compared as numbers. With ``last_weeks`` the
      cutoff is that many weeks before the newest time of the rows, so the held-out window rolls forward
      with each new drop.
    - ``hash``: rows whose seeded id hash falls in the test share (see ``hash_is_test``); needs ``id_column``.
    """
    n = len(frame)
    if split.method == "random":
        if n < 2:
            raise InputError(f"cannot split {n} row(s) into a train and a test part; at least 2 are needed")
        n_test = min(max(math.ceil(n * split.test_fraction), 1), n - 1)
        order = np.random.default_rng(split.seed).permutation(n)
        is_test = np.zeros(n, dtype=bool)
        is_test[order[:n_test]] = True
    elif split.method == "hash":
        is_test = test_mask(frame, split, id_column)
        if is_test.all() or not is_test.any():
            raise InputError(f"hash split of {n} row(s) with test_fraction {split.test_fraction} leaves one part "
                             f"empty; use more rows or another split.test_fraction")
    else:
        column = split.time_column
        assert column is not None  # the spec model requires it for a time split
        if column not in frame.columns:
            raise InputError(f"time split: column {column!r} (spec key split.time_column) is not in the table")
        times = parse_times(frame[column])
        cutoff = _cutoff_for(times, split)
        unreadable = times.isna().to_numpy()
        if unreadable.any():
            raise InputError(
                f"time split: {int(unreadable.sum())} row(s) of column {column!r} cannot be read as a time; "
                f"{examples(with_bookkeeping(frame), np.flatnonzero(unreadable))}"
            )
        is_test = (times >= cutoff).to_numpy(dtype=bool)
        if is_test.all() or not is_test.any():
            side = "train" if is_test.all() else "test"
            at = (f"cutoff {split.cutoff!r} (spec key split.cutoff)" if split.last_weeks is None
                  else f"the last {split.last_weeks} week(s), from {cutoff} (spec key split.last_weeks)")
            raise InputError(
                f"time split on column {column!r} at {at} leaves the "
                f"{side} part empty: times run from {times.min()} to {times.max()}"
            )
    train = frame[~is_test].reset_index(drop=True)
    test = frame[is_test].reset_index(drop=True)
    return train, test



@task(name="split", cache_policy=NO_CACHE)
def split(frame: pd.DataFrame, split: SplitSpec, id_column: str | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """split_rows as a task."""
    return split_rows(frame, split, id_column)
