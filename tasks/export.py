"""Take a vector set out of the registry as plain tables: Parquet, CSV and NumPy, with the vocabulary as JSON."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from entivec.schemas.vector_set import VectorSet, column_file_stem
from entivec.schemas.vocabulary import UNKNOWN_ID


def vector_table(vector_set: VectorSet, column: str) -> pd.DataFrame:
    """One row per vocabulary id: id, category, count, is_unknown, then one column per component."""
    vocab = vector_set.vocabularies[column]
    matrix = vector_set.vectors[column]
    table = pd.DataFrame(
        {
            "id": np.arange(vocab.size),
            "category": vocab.categories,
            "count": vocab.counts,
            "is_unknown": np.arange(vocab.size) == UNKNOWN_ID,
        }
    )
    components = pd.DataFrame(matrix, columns=[f"v{i}" for i in range(matrix.shape[1])])
    return pd.concat([table, components], axis=1)


def export_vector_set(vector_set: VectorSet, out: str | Path) -> list[Path]:
    """Write every column's table as Parquet and CSV, its matrix as .npy and its vocabulary as JSON."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    for column in vector_set.columns:
        stem = column_file_stem(column)
        table = vector_table(vector_set, column)
        table.to_parquet(out / f"{stem}.parquet", index=False)
        table.to_csv(out / f"{stem}.csv", index=False)
        np.save(out / f"{stem}.npy", vector_set.vectors[column].astype(np.float32), allow_pickle=False)
        vector_set.vocabularies[column].save(out / f"{stem}.vocabulary.json")
        written += [out / f"{stem}.{ext}" for ext in ("parquet", "csv", "npy", "vocabulary.json")]
    return written
