"""Ledger lines that change no row's fate: row numbers as ids, whitespace variants merged, values to be imputed."""

from __future__ import annotations

import numpy as np
import pandas as pd

from entivec.schemas.ledger import Ledger
from entivec.schemas.spec import ROW_ID, Spec
from entivec.tasks.ingest.common import EXAMPLES


def with_row_ids(raw: pd.DataFrame, spec: Spec, ledger: Ledger | None = None, first: int = 1) -> pd.DataFrame:
    """Without an ``id_column`` in the spec, number the rows in read order (``first``, ``first`` + 1, ...) as ids."""
    if spec.id_column is not None or ROW_ID in raw.columns:
        return raw
    if ledger is not None:
        ledger.record(
            "row_number_as_id", "report", len(raw),
            "the spec names no id_column: rows are numbered in read order (files in sorted path order) and the "
            "number is the id; such ids name rows of this read only, not the same record in a later drop",
        )
    return raw.assign(**{ROW_ID: pd.Series(np.arange(first, first + len(raw)), index=raw.index).astype(str)})


def whitespace_merges(raw: pd.DataFrame, spec: Spec, ledger: Ledger, skip: np.ndarray) -> None:
    """A ledger line per category column where spellings differing only by outer spaces became one category."""
    keep = np.ones(len(raw), dtype=bool)
    keep[skip] = False
    for column in [*spec.embed_names, *spec.onehot_names]:
        values = raw[column]
        if pd.api.types.is_numeric_dtype(values.dtype) or pd.api.types.is_bool_dtype(values.dtype):
            continue
        text = values[keep].astype("string")
        trimmed = text.str.strip()
        padded = (text != trimmed).fillna(False).to_numpy(dtype=bool) & (trimmed != "").fillna(False).to_numpy()
        if not padded.any():
            continue
        variants = pd.DataFrame({"as_read": text[padded], "category": trimmed[padded]}).drop_duplicates()
        shown = "; ".join(f"{a!r} -> {c!r}" for a, c in variants.head(EXAMPLES).itertuples(index=False))
        ledger.record(
            f"whitespace:{column}", "report", int(padded.sum()),
            f"values with leading or trailing spaces read as their trimmed spelling: {len(variants)} spelling(s) "
            f"merged into {variants['category'].nunique()} categor(ies), e.g. {shown}",
        )


def imputed(frame: pd.DataFrame, spec: Spec, ledger: Ledger) -> None:
    for col in spec.columns.numeric:
        if col.impute == "none":
            continue
        missing = int(frame[col.name].isna().sum())
        ledger.record(
            f"impute:{col.name}", "report", missing,
            f"missing {col.name} kept; the network input is filled with the training rows' {col.impute} (stored in "
            f"the vector set's encoder) and an indicator input '{col.name}=missing' is added",
        )
