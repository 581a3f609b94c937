"""A category vocabulary: categories in id order with counts; id 0 is the unknown row."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

UNKNOWN = "<unknown>"
UNKNOWN_ID = 0


def category_strings(values: pd.Series) -> pd.Series:
    """Categories as strings, missing values kept missing. All lookups go through this one spelling."""
    out = values.astype("string")
    return out.str.strip().replace("", pd.NA)


@dataclass
class Vocabulary:
    """Categories of one column in id order. ``categories[0]`` is the unknown marker and is never a real value.

    Ids are stable across versions: a vocabulary built with ``previous`` keeps every category it knew at the
    same id (even if it is now rare or absent: its count is then the new count, possibly 0) and appends new
    categories after them, most frequent first. A category seen fewer than ``min_count`` times that was not
    already known maps to the unknown id.
    """

    column: str
    categories: list[str]
    counts: list[int]
    min_count: int = 1
    unknown_count: int = 0
    _index: pd.Index = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self.categories or self.categories[0] != UNKNOWN:
            raise ValueError(f"vocabulary of {self.column!r}: id 0 must be {UNKNOWN!r}")
        if len(self.categories) != len(self.counts):
            raise ValueError(
                f"vocabulary of {self.column!r}: {len(self.categories)} categories, {len(self.counts)} counts"
            )
        if len(set(self.categories)) != len(self.categories):
            raise ValueError(f"vocabulary of {self.column!r}: duplicate categories")
        self._index = pd.Index(self.categories[1:], dtype="string")

    def __len__(self) -> int:
        return len(self.categories)

    @property
    def size(self) -> int:
        """Rows in the vector matrix, the unknown row included."""
        return len(self.categories)

    @classmethod
    def build(
        cls, column: str, values: pd.Series, min_count: int = 1, previous: Vocabulary | None = None
    ) -> Vocabulary:
        strings = category_strings(values)
        return cls.from_counts(column, strings.value_counts(dropna=True), len(strings), int(strings.isna().sum()),
                               min_count, previous)

    @classmethod
    def from_counts(
        cls, column: str, observed: pd.Series, rows: int, missing: int, min_count: int = 1,
        previous: Vocabulary | None = None,
    ) -> Vocabulary:
        """The vocabulary of ``rows`` values whose categories (spelled by ``category_strings``) were counted as
        ``observed`` (category -> count; counts of several batches may be summed first) and ``missing`` of which
        were missing. Gives what :meth:`build` gives on the same values."""
        observed = observed.astype(np.int64)
        observed = observed.sort_index(kind="stable").sort_values(ascending=False, kind="stable")
        if previous is not None:
            if previous.column != column:
                raise ValueError(f"previous vocabulary is of {previous.column!r}, not {column!r}")
            known = previous.categories[1:]
            known_set = set(known)
            counts = [int(observed.get(c, 0)) for c in known]
            new = observed[(observed >= min_count) & ~observed.index.isin(known_set)]
            categories = [UNKNOWN, *known, *new.index.tolist()]
            counts = [0, *counts, *new.astype(int).tolist()]
        else:
            kept = observed[observed >= min_count]
            categories = [UNKNOWN, *kept.index.tolist()]
            counts = [0, *kept.astype(int).tolist()]
        counted = sum(counts[1:])
        counts[0] = int(rows - counted)  # rows that will map to unknown: rare or missing
        return cls(column, categories, counts, min_count=min_count, unknown_count=missing)

    def encode(self, values: pd.Series) -> np.ndarray:
        """Ids for values: known categories get their id, anything else (unseen, rare, missing) gets 0."""
        positions = self._index.get_indexer(category_strings(values))
        return (positions + 1).astype(np.int64)  # -1 (not found) becomes 0 = unknown

    def to_dict(self) -> dict:
        return {
            "column": self.column,
            "unknown_id": UNKNOWN_ID,
            "unknown_marker": UNKNOWN,
            "min_count": self.min_count,
            "missing_count": self.unknown_count,
            "categories": self.categories,
            "counts": self.counts,
        }

    @classmethod
    def from_dict(cls, data: dict) -> Vocabulary:
        return cls(
            column=data["column"],
            categories=list(data["categories"]),
            counts=[int(c) for c in data["counts"]],
            min_count=int(data.get("min_count", 1)),
            unknown_count=int(data.get("missing_count", 0)),
        )

    def save(self, path: str | Path) -> None:
        Path(path).write_text(json.dumps(self.to_dict(), ensure_ascii=False, indent=1), encoding="utf-8")

    @classmethod
    def load(cls, path: str | Path) -> Vocabulary:
        return cls.from_dict(json.loads(Path(path).read_text(encoding="utf-8")))
