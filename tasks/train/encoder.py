"""Turning cleaned rows into network inputs: vocabulary ids, standardized numerics, one-hot indicators.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from entivec.schemas.spec import Spec
from entivec.schemas.vocabulary import Vocabulary, category_strings

# --- encoding a cleaned frame into network inputs ----------------------------------------------------------------


def numeric_fill(values: np.ndarray, impute: str) -> float | None:
    """The value a column's missing entries get (the median of the finite training values), or None."""
    if impute != "median":
        return None
    seen = values[np.isfinite(values)]
    return float(np.median(seen)) if seen.size else 0.0


def transformed(values: np.ndarray, transform: str, fill: float | None) -> tuple[np.ndarray, np.ndarray]:
    """Values filled (when ``fill`` is given) and transformed, and where they were missing."""
    missing = np.isnan(values)
    if fill is not None:
        values = np.where(missing, fill, values)
    with np.errstate(divide="ignore", invalid="ignore"):
        if transform == "log":
            values = np.log(values)
        elif transform == "log1p":
            values = np.log1p(values)
    return values, missing


def standardizer(values: np.ndarray) -> tuple[float, float]:
    """Mean and population standard deviation of the finite values; 1 for a constant or empty column."""
    ok = np.isfinite(values)
    finite = values if ok.all() else values[ok]  # no copy of a column without gaps
    mean = float(finite.mean()) if finite.size else 0.0
    std = float(finite.std()) if finite.size else 0.0
    return mean, (std if std > 0 and math.isfinite(std) else 1.0)


@dataclass
class EncodedInputs:
    """Network inputs for n rows."""

    cat_ids: np.ndarray  # int64 (n, k): vocabulary ids per embedded column, in spec.embed_names order
    dense: np.ndarray  # float32 (n, d): standardized numerics, then one-hot indicator columns

    def __post_init__(self) -> None:
        self.cat_ids = np.asarray(self.cat_ids, dtype=np.int64)
        self.dense = np.asarray(self.dense, dtype=np.float32)
        if self.cat_ids.ndim != 2 or self.dense.ndim != 2:
            raise ValueError("EncodedInputs: cat_ids and dense must both be 2-D arrays")
        if len(self.cat_ids) != len(self.dense):
            raise ValueError(f"EncodedInputs: {len(self.cat_ids)} rows of ids but {len(self.dense)} dense rows")

    def __len__(self) -> int:
        return len(self.cat_ids)

    def take(self, rows: np.ndarray) -> EncodedInputs:
        """The inputs of the given rows (positions or a boolean mask)."""
        return EncodedInputs(self.cat_ids[rows], self.dense[rows])


def numeric_stats(values: np.ndarray, col) -> tuple[float, float, float | None]:
    """(mean, std, fill) of one numeric column's training values as read, for its spec entry ``col``."""
    fill = numeric_fill(values, col.impute)
    mean, std = standardizer(transformed(values, col.transform, fill)[0])
    return mean, std, fill


@dataclass
class FeatureEncoder:
    """Fitted on training rows only; turns a cleaned frame into :class:`EncodedInputs`.

    - embedded columns: vocabulary ids (unknown, rare or missing -> id 0);
    - numeric columns: a missing value of a column declared ``impute: median`` is first filled with the training
      rows' median (on the scale as read) and flagged in an indicator input ``<column>=missing``; then the
      column's ``transform`` (log or log1p) is applied; then it is standardized with the training mean and
      standard deviation (population, ddof=0); a constant column gets a standard deviation of 1; a value still
      missing becomes 0, i.e. the training mean;
    - one-hot columns: one indicator per level observed on the training rows, in sorted order; a level not
      seen in training, or a missing value, gives all zeros.
    """

    embed_columns: list[str]
    vocabularies: dict[str, Vocabulary]
    numeric_columns: list[str]
    numeric_mean: list[float]
    numeric_std: list[float]
    onehot_levels: dict[str, list[str]] = field(default_factory=dict)
    numeric_transform: list[str] = field(default_factory=list)  # per numeric column: none, log or log1p
    numeric_fill: list[float | None] = field(default_factory=list)  # per numeric column: the median, or None

    def __post_init__(self) -> None:
        # Encoders stored before transforms and imputation existed have neither: no transform, no fill.
        n = len(self.numeric_columns)
        self.numeric_transform = list(self.numeric_transform) or ["none"] * n
        self.numeric_fill = list(self.numeric_fill) or [None] * n

    def _numeric(self, frame: pd.DataFrame, j: int) -> tuple[np.ndarray, np.ndarray]:
        """Column j as read, filled and transformed (not yet standardized), and where it was missing."""
        values = pd.to_numeric(frame[self.numeric_columns[j]], errors="coerce").to_numpy(dtype=np.float64)
        return transformed(values, self.numeric_transform[j], self.numeric_fill[j])

    @classmethod
    def fit(cls, frame: pd.DataFrame, spec: Spec, vocabularies: dict[str, Vocabulary]) -> FeatureEncoder:
        missing = [c for c in spec.feature_columns if c not in frame.columns]
        if missing:
            raise KeyError(f"feature encoder: the frame lacks column(s) {missing}")
        absent = [c for c in spec.embed_names if c not in vocabularies]
        if absent:
            raise KeyError(f"feature encoder: no vocabulary for embedded column(s) {absent}")
        stats = [numeric_stats(pd.to_numeric(frame[col.name], errors="coerce").to_numpy(dtype=np.float64), col)
                 for col in spec.columns.numeric]
        levels = {}
        for name in spec.onehot_names:
            observed = category_strings(frame[name]).dropna().unique()
            levels[name] = sorted(str(v) for v in observed)
        return cls.from_stats(spec, vocabularies, stats, levels)

    @classmethod
    def from_stats(
        cls, spec: Spec, vocabularies: dict[str, Vocabulary], stats: list[tuple[float, float, float | None]],
        levels: dict[str, list[str]],
    ) -> FeatureEncoder:
        """An encoder from per-numeric-column (mean, std, fill) and one-hot levels computed elsewhere (a stream)."""
        means = [s[0] for s in stats]
        stds = [s[1] for s in stats]
        fills = [s[2] for s in stats]
        transforms = [c.transform for c in spec.columns.numeric]
        return cls(
            embed_columns=list(spec.embed_names),
            vocabularies={c: vocabularies[c] for c in spec.embed_names},
            numeric_columns=list(spec.numeric_names),
            numeric_mean=means,
            numeric_std=stds,
            onehot_levels=levels,
            numeric_transform=transforms,
            numeric_fill=fills,
        )

    @property
    def indicator_columns(self) -> list[str]:
        """Numeric columns with a missing-value indicator input (those imputed)."""
        return [c for c, fill in zip(self.numeric_columns, self.numeric_fill, strict=True) if fill is not None]

    @property
    def dense_names(self) -> list[str]:
        """Names of the dense input columns, in order: numerics, then ``column=level`` indicators."""
        names = list(self.numeric_columns) + [f"{c}=missing" for c in self.indicator_columns]
        for column, levels in self.onehot_levels.items():
            names.extend(f"{column}={level}" for level in levels)
        return names

    def transform(self, frame: pd.DataFrame) -> EncodedInputs:
        n = len(frame)
        cat_ids = np.zeros((n, len(self.embed_columns)), dtype=np.int64)
        for j, name in enumerate(self.embed_columns):
            cat_ids[:, j] = self.vocabularies[name].encode(frame[name])
        dense = np.zeros((n, len(self.dense_names)), dtype=np.float32)
        start = len(self.numeric_columns)
        for j in range(len(self.numeric_columns)):
            values, missing = self._numeric(frame, j)
            scaled = (values - self.numeric_mean[j]) / self.numeric_std[j]
            dense[:, j] = np.where(np.isfinite(scaled), scaled, 0.0)
            if self.numeric_fill[j] is not None:
                dense[:, start] = missing
                start += 1
        for name, levels in self.onehot_levels.items():
            positions = pd.Index(levels, dtype="string").get_indexer(category_strings(frame[name]))
            rows = np.flatnonzero(positions >= 0)
            dense[rows, start + positions[rows]] = 1.0
            start += len(levels)
        return EncodedInputs(cat_ids, dense)

    def to_dict(self) -> dict:
        """JSON-safe state; the vocabularies are stored on their own and passed back to :meth:`from_dict`."""
        return {
            "embed_columns": list(self.embed_columns),
            "numeric_columns": list(self.numeric_columns),
            "numeric_mean": [float(v) for v in self.numeric_mean],
            "numeric_std": [float(v) for v in self.numeric_std],
            "onehot_levels": {k: list(v) for k, v in self.onehot_levels.items()},
            "numeric_transform": list(self.numeric_transform),
            "numeric_fill": [None if v is None else float(v) for v in self.numeric_fill],
        }

    @classmethod
    def from_dict(cls, data: dict, vocabularies: dict[str, Vocabulary]) -> FeatureEncoder:
        columns = list(data["embed_columns"])
        absent = [c for c in columns if c not in vocabularies]
        if absent:
            raise KeyError(f"feature encoder: no vocabulary for embedded column(s) {absent}")
        return cls(
            embed_columns=columns,
            vocabularies={c: vocabularies[c] for c in columns},
            numeric_columns=list(data["numeric_columns"]),
            numeric_mean=[float(v) for v in data["numeric_mean"]],
            numeric_std=[float(v) for v in data["numeric_std"]],
            onehot_levels={k: list(v) for k, v in data["onehot_levels"].items()},
            numeric_transform=list(data.get("numeric_transform", [])),
            numeric_fill=[None if v is None else float(v) for v in data.get("numeric_fill", [])],
        )
