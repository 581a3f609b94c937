"""The on-disk layout of a vector set: vocabularies and vectors of every embedded column, plus metadata.

Layout of a vector-set folder (open formats only; nothing here is ever pickled)::

    vector_set.json              metadata: format, model name, columns, sizes, spec hash, data fingerprint,
                                 code version, metrics
    vocabulary/<column>.json     the Vocabulary of each embedded column
    vectors/<column>.npy         float32 matrix, one row per vocabulary id (row 0 = unknown)
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

    def __post_init__(self) -> None:
        if set(self.vocabularies) != set(self.vectors):
            raise ValueError("vector set: vocabularies and vectors name different columns")
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
        meta = {
            **self.metadata,
            "format": FORMAT,
            "columns": self.columns,
            "files": files,
            "dimensions": {c: self.dimension(c) for c in self.columns},
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
        return cls(vocabularies, vectors, meta)


def component_names(column: str, dimension: int) -> list[str]:
    """Names of the feature columns that carry a column's vector components."""
    return [f"{column}__vec{i}" for i in range(dimension)]
