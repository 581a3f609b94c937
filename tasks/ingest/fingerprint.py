"""What identifies the data a vector set was trained on: a content hash of the rows as read, per file too.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.tasks.ingest.read import BOOKKEEPING, RAW_LINE, SOURCE_FILE

# --- fingerprint and quarantine files ---------------------------------------------------------------------------


def _row_hashes(frame: pd.DataFrame, columns: list) -> np.ndarray:
    if not len(frame):
        return np.zeros(0, dtype="<u8")
    return pd.util.hash_pandas_object(frame[columns], index=False, categorize=True).to_numpy().astype("<u8")


def _digest(columns: list[str], hashes: np.ndarray) -> str:
    h = hashlib.sha256()
    h.update(json.dumps(columns).encode())
    h.update(hashes.tobytes())
    return h.hexdigest()


def _file_bytes_sha256(path: str) -> str | None:
    h = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                h.update(block)
    except OSError:
        return None
    return h.hexdigest()


def data_fingerprint(raw: pd.DataFrame, files: list[str]) -> dict:
    """What identifies the data a vector set was trained on.

    ``sha256`` hashes the values as read (``pandas.util.hash_pandas_object`` per row, columns in sorted name
    order, the column names included) and nothing else: the same rows in the same order give the same hash
    wherever the files live and whatever their column order. Per file: rows, the same content hash over its
    rows, and the SHA-256 of its bytes (None when the file cannot be opened now). Row hashing is pandas'
    own, so compare fingerprints made with the same pandas major version (recorded here).
    """
    names = sorted((c for c in raw.columns if c not in BOOKKEEPING), key=str)
    if RAW_LINE in raw.columns and raw[RAW_LINE].notna().any():
        names.append(RAW_LINE)  # a ragged line's text is data as read: changing it changes the fingerprint
    columns = [str(c) for c in names]
    hashes = _row_hashes(raw, names)
    per_file = []
    if SOURCE_FILE in raw.columns:
        sources = raw[SOURCE_FILE].astype(str).to_numpy()
        for name in files:
            mask = sources == str(name)
            per_file.append(
                {
                    "name": Path(name).name,
                    "rows": int(mask.sum()),
                    "sha256": _digest(columns, hashes[mask]),
                    "bytes_sha256": _file_bytes_sha256(name),
                }
            )
    return {
        "sha256": _digest(columns, hashes),
        "rows": int(len(raw)),
        "columns": [str(c) for c in raw.columns if c not in BOOKKEEPING],
        "files": per_file,
        "method": "sha256 over pandas.util.hash_pandas_object rows, columns in sorted order",
        "pandas": pd.__version__,
    }
