"""Take a vector set out of the registry as plain tables: Parquet, CSV and NumPy, with the vocabulary as JSON.

Row 0 of every exported matrix and table is the unknown row (unseen, too rare or missing categories); the
tables mark it with ``is_unknown`` and the category ``<unknown>``, and ``manifest.json`` says so for the
``.npy`` files, which carry numbers only.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.schemas.vector_set import VectorSet, column_file_stem
from entivec.schemas.vocabulary import UNKNOWN, UNKNOWN_ID

MANIFEST_FORMAT = "entivec.export/1"


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
    written.append(write_manifest(vector_set, out))
    return written


def write_manifest(vector_set: VectorSet, out: Path) -> Path:
    """``manifest.json``: which file holds which column, and how the unknown row is marked in each."""
    carried = ("model_name", "spec_hash", "data_fingerprint", "code_version")
    manifest = {
        "format": MANIFEST_FORMAT,
        **{k: vector_set.metadata[k] for k in carried if k in vector_set.metadata},
        "unknown_id": UNKNOWN_ID,
        "unknown_marker": UNKNOWN,
        "unknown_rows": "row 0 of every matrix; in the tables id 0, category = unknown_marker, is_unknown = true",
        "columns": {
            column: {
                "dimension": vector_set.dimension(column),
                "rows": vector_set.vocabularies[column].size,
                "files": {
                    kind: f"{column_file_stem(column)}.{kind}" for kind in ("parquet", "csv", "npy", "vocabulary.json")
                },
            }
            for column in vector_set.columns
        },
    }
    path = out / "manifest.json"
    path.write_text(json.dumps(manifest, indent=1, ensure_ascii=False, default=str), encoding="utf-8")
    return path
