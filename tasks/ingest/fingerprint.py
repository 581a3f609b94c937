"""What identifies the data a vector set was trained on: a content hash of the rows as read, per file too.

The hash is computed batch by batch (:class:`StreamFingerprint`), so a table read as a stream and the same
table read whole give the same fingerprint.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.tasks.ingest.read import BOOKKEEPING, RAW_LINE, SOURCE_FILE


def _row_hashes(frame: pd.DataFrame, columns: list) -> np.ndarray:
    if not len(frame):
        return np.zeros(0, dtype="<u8")
    return pd.util.hash_pandas_object(frame[columns], index=False, categorize=True).to_numpy().astype("<u8")


def _file_bytes_sha256(path: str) -> str | None:
    h = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                h.update(block)
    except OSError:
        return None
    return h.hexdigest()


class _Digest:
    def __init__(self, columns: list[str]) -> None:
        self.sha = hashlib.sha256(json.dumps(columns).encode())
        self.rows = 0
        self.ragged: list[bytes] = []

    def update(self, hashes: np.ndarray, ragged: np.ndarray) -> None:
        self.sha.update(hashes.tobytes())
        self.rows += len(hashes)
        if len(ragged):
            self.ragged.append(ragged.tobytes())

    def hexdigest(self) -> str:
        out = self.sha.copy()
        if self.ragged:
            # A ragged line's text is data as read: changing it changes the fingerprint.
            out.update(b"ragged lines")
            for part in self.ragged:
                out.update(part)
        return out.hexdigest()


class StreamFingerprint:
    """Fingerprint fed batch by batch, in read order; ``columns`` are the data columns (bookkeeping left out)."""

    def __init__(self, columns: list[str]) -> None:
        self.columns = [str(c) for c in columns]
        self.names = sorted(columns, key=str)
        self.whole = _Digest([str(c) for c in self.names])
        self.per_file: dict[str, _Digest] = {}

    def update(self, frame: pd.DataFrame) -> None:
        hashes = _row_hashes(frame, self.names)
        ragged_mask = frame[RAW_LINE].notna().to_numpy() if RAW_LINE in frame.columns else np.zeros(len(frame), bool)
        ragged = _row_hashes(frame.loc[ragged_mask], [RAW_LINE]) if ragged_mask.any() else np.zeros(0, "<u8")
        self.whole.update(hashes, ragged)
        if SOURCE_FILE not in frame.columns:
            return
        sources = frame[SOURCE_FILE].astype(str).to_numpy()
        for name in pd.unique(sources):
            mask = sources == name
            digest = self.per_file.setdefault(str(name), _Digest([str(c) for c in self.names]))
            digest.update(hashes[mask], ragged[np.flatnonzero(mask[ragged_mask])] if len(ragged) else ragged)

    def result(self, files: list[str]) -> dict:
        per_file = []
        for name in files:
            digest = self.per_file.get(str(name)) or _Digest([str(c) for c in self.names])
            per_file.append({"name": Path(name).name, "rows": digest.rows, "sha256": digest.hexdigest(),
                             "bytes_sha256": _file_bytes_sha256(name)})
        return {
            "sha256": self.whole.hexdigest(),
            "rows": self.whole.rows,
            "columns": self.columns,
            "files": per_file if self.per_file else [],
            "method": "sha256 over pandas.util.hash_pandas_object rows, columns in sorted order",
            "pandas": pd.__version__,
        }


def data_fingerprint(raw: pd.DataFrame, files: list[str]) -> dict:
    """What identifies the data a vector set was trained on.

    ``sha256`` hashes the values as read (``pandas.util.hash_pandas_object`` per row, columns in sorted name
    order, the column names included) and nothing else: the same rows in the same order give the same hash
    wherever the files live and whatever their column order. Per file: rows, the same content hash over its
    rows, and the SHA-256 of its bytes (None when the file cannot be opened now). Row hashing is pandas'
    own, so compare fingerprints made with the same pandas major version (recorded here).
    """
    stream = StreamFingerprint([c for c in raw.columns if c not in BOOKKEEPING])
    stream.update(raw)
    return stream.result(files)
