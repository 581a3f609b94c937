"""The on-disk layout of a vector set: vocabularies and vectors of every embedded column, plus metadata.

Layout of a vector-set folder (open formats only; nothing here is ever pickled)::

    vector_set.json              metadata: format, model name, columns, sizes, spec hash, data fingerprint,
                                 code version, metrics
    vocabulary/<column>.json     the Vocabulary of each embedded column
    vectors/<column>.npy         float32 matrix, one row per vocabulary id (row 0 = unknown)
    confidence/<column>.parquet  optional: how well each category's vector is determined (CONFIDENCE_COLUMNS),
                                 one row per vocabulary id in id order
"""

from __future__ import annotations

import json
import re
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from entivec.schemas.vocabulary import Vocabulary

FORMAT = "entivec.vector_set/1"
# Per-category confidence, one row per vocabulary id (row 0 = unknown): `count` training rows of the category,
# `spread` the root mean squared distance of its aligned fold vectors around its full-data vector, `relative_spread`
# that spread over the column's median distance between categories, `in_all_folds` whether every fold network
# saw it in training. NaN spread where no fold saw the category.
CONFIDENCE_COLUMNS = ("id", "category", "count", "spread", "relative_spread", "in_all_folds")
_SAFE = re.compile(r"[^A-Za-z0-9_.-]")


def column_file_stem(column: str) -> str:
    """A file name for a column that is safe on every file system, and still tells which column it is."""
    stem = _SAFE.sub("_", column)
    return stem if stem == column else f"{stem}-{zlib.crc32(column.encode()):08x}"


@dataclass
class VectorSet:
    vocabularies: dict[str, Vocabulary]
    vectors: dict[str, np.ndarray]
    metadata: dict[str, Any] = field(default_factory=dict)
    # column -> pandas DataFrame with CONFIDENCE_COLUMNS; empty when the run trained no fold networks
    confidence: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if set(self.vocabularies) != set(self.vectors):
            raise ValueError("vector set: vocabularies and vectors name different columns")
        for col, table in self.confidence.items():
            if col not in self.vectors:
                raise ValueError(f"vector set: confidence for {col!r}, which has no vectors")
            missing = [c for c in CONFIDENCE_COLUMNS if c not in table.columns]
            if missing or len(table) != self.vocabularies[col].size:
                raise ValueError(
                    f"vector set: confidence of column {col!r} needs columns {list(CONFIDENCE_COLUMNS)} and one row "
                    f"per vocabulary id ({self.vocabularies[col].size}); has {list(table.columns)}, {len(table)} rows"
                )
        for col, matrix in self.vectors.items():
            if matrix.ndim != 2 or matrix.shape[0] != self.vocabularies[col].size:
                raise ValueError(
                    f"vector set: column {col!r} has {matrix.shape[0]} vector rows for "
                    f"{self.vocabularies[col].size} vocabulary ids"
                )

    @property
    def columns(self) -> list[str]:
        return list(self.vectors)

    def dimension(self, column: str) -> int:
        return int(self.vectors[column].shape[1])

    def lookup(self, column: str, values) -> np.ndarray:
        """Vectors for a sequence of category values; unknown or missing get row 0."""
        import pandas as pd

        ids = self.vocabularies[column].encode(pd.Series(values))
        return self.vectors[column][ids]

    def save(self, folder: str | Path) -> Path:
        folder = Path(folder)
        (folder / "vocabulary").mkdir(parents=True, exist_ok=True)
        (folder / "vectors").mkdir(parents=True, exist_ok=True)
        files = {}
        for col in self.columns:
            stem = column_file_stem(col)
            self.vocabularies[col].save(folder / "vocabulary" / f"{stem}.json")
            np.save(folder / "vectors" / f"{stem}.npy", np.ascontiguousarray(self.vectors[col], dtype=np.float32))
            files[col] = stem
        if self.confidence:
            (folder / "confidence").mkdir(parents=True, exist_ok=True)
            for col, table in self.confidence.items():
                table.loc[:, list(CONFIDENCE_COLUMNS)].to_parquet(
                    folder / "confidence" / f"{column_file_stem(col)}.parquet", index=False
                )
        meta = {
            **self.metadata,
            "format": FORMAT,
            "columns": self.columns,
            "files": files,
            "dimensions": {c: self.dimension(c) for c in self.columns},
            "confidence_columns": sorted(self.confidence),
        }
        (folder / "vector_set.json").write_text(json.dumps(meta, indent=1, default=str), encoding="utf-8")
        return folder

    @classmethod
    def load(cls, folder: str | Path) -> VectorSet:
        folder = Path(folder)
        meta_path = folder / "vector_set.json"
        if not meta_path.exists():
            raise FileNotFoundError(f"{folder} is not a vector set folder (no vector_set.json)")
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
        if meta.get("format") != FORMAT:
            raise ValueError(f"{meta_path}: unsupported format {meta.get('format')!r}, expected {FORMAT!r}")
        vocabularies, vectors = {}, {}
        for col in meta["columns"]:
            stem = meta["files"][col]
            vocabularies[col] = Vocabulary.load(folder / "vocabulary" / f"{stem}.json")
            vectors[col] = np.load(folder / "vectors" / f"{stem}.npy", allow_pickle=False)
        confidence = {}
        for col in meta.get("confidence_columns", []):
            import pandas as pd

            confidence[col] = pd.read_parquet(folder / "confidence" / f"{meta['files'][col]}.parquet")
        return cls(vocabularies, vectors, meta, confidence)


def component_names(column: str, dimension: int) -> list[str]:
    """Names of the feature columns that carry a column's vector components."""
    return [f"{column}__vec{i}" for i in range(dimension)]
