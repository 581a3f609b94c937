"""Take a vector set out of the registry as plain tables: Parquet, CSV and NumPy, with the vocabulary as JSON.

Row 0 of every exported matrix and table is the unknown row (unseen, too rare or missing categories); the
tables mark it with ``is_unknown`` and the category ``<unknown>``, and ``manifest.json`` says so for the
``.npy`` files, which carry numbers only.

Each table holds metadata columns first (``id``, ``category``, ``count``, ``is_unknown`` and, when the vector set
has confidence figures, ``spread``, ``relative_spread``, ``in_all_folds``), then the vector components named
``<column>__vec<i>``, as the transformer and the apply job name them. ``manifest.json`` lists both groups per
column, so a consumer never has to guess which numeric columns are the vector.

Where the files came from travels with them: model name, version, run id, the aliases that pointed at the
version when it was exported, and the data fingerprint are in the manifest, in each Parquet file's key-value
metadata (keys ``entivec.*``) and in each vocabulary JSON (key ``exported_from``).

CSV files are opened in spreadsheets; a text cell starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
return would be run as a formula there, so such cells get a leading apostrophe in the CSV only (the rule of the
OWASP "CSV Injection" guidance). Parquet, ``.npy`` and the vocabulary JSON keep the raw values; the manifest
records the rule and how many cells it changed.

All files of one export appear together or not at all (:class:`~entivec.tasks.apply.outputs.OutputSet`).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from entivec.schemas.vector_set import CONFIDENCE_COLUMNS, VectorSet, column_file_stem, component_names
from entivec.schemas.vocabulary import UNKNOWN, UNKNOWN_ID
from entivec.tasks.apply.outputs import OutputSet

MANIFEST_FORMAT = "entivec.export/2"
METADATA_PREFIX = "entivec."
BASE_COLUMNS = ("id", "category", "count", "is_unknown")
CONFIDENCE_EXTRA = tuple(c for c in CONFIDENCE_COLUMNS if c not in BASE_COLUMNS)
FILE_KINDS = ("parquet", "csv", "npy", "vocabulary.json")
# OWASP, "CSV Injection" (owasp.org/www-community/attacks/CSV_Injection): cells beginning with these characters
# are interpreted as formulas by spreadsheet programs; prefixing a single quote makes them plain text.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
FORMULA_GUARD = {
    "applies_to": "csv files only; parquet, npy and vocabulary json keep the raw values",
    "rule": "a text cell starting with = + - @ tab or carriage return gets a leading apostrophe (')",
    "source": "OWASP, CSV Injection, https://owasp.org/www-community/attacks/CSV_Injection",
}


def neutralise_formulas(values: pd.Series) -> tuple[pd.Series, int]:
    """Text values a spreadsheet would run as formulas, prefixed with an apostrophe; and how many changed."""
    text = values.astype("string")
    risky = text.str.startswith(FORMULA_STARTS).fillna(False).to_numpy(dtype=bool)
    if not risky.any():
        return values, 0
    out = values.astype(object).copy()
    out[risky] = "'" + text[risky].astype(object)
    return out, int(risky.sum())


def spreadsheet_safe(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with every text column's formula-like cells neutralised, for any CSV a person may open."""
    out = frame.copy()
    for col in out.columns:
        if pd.api.types.is_object_dtype(out[col]) or pd.api.types.is_string_dtype(out[col]):
            out[col], _ = neutralise_formulas(out[col])
    return out


def export_source(
    name: str, version: str, run_id: str, vector_set: VectorSet, asked: str | None = None,
    aliases: Mapping[str, str] | None = None,
) -> dict[str, str | list[str]]:
    """Where an export comes from: model, version, run, the aliases on the version now, and the data.

    ``asked`` is what the user named (a number or an alias); ``aliases`` maps every alias of the model to its
    version at export time.
    """
    on_version = sorted(a for a, v in (aliases or {}).items() if str(v) == str(version))
    if asked and not str(asked).isdigit() and str(asked) not in on_version:
        on_version = sorted([*on_version, str(asked)])
    return {
        "model_name": name,
        "version": str(version),
        "run_id": run_id,
        "aliases_at_export": on_version,
        "data_fingerprint": str(vector_set.metadata.get("data_fingerprint", "")),
        "exported_at": datetime.now(UTC).isoformat(timespec="seconds"),
    }


def metadata_columns(vector_set: VectorSet, column: str) -> list[str]:
    """The non-vector columns of a column's table, in order."""
    extra = list(CONFIDENCE_EXTRA) if column in vector_set.confidence else []
    return [*BASE_COLUMNS, *extra]


def vector_table(vector_set: VectorSet, column: str) -> pd.DataFrame:
    """One row per vocabulary id: the metadata columns, then one ``<column>__vec<i>`` per component."""
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
    if column in vector_set.confidence:
        confidence = vector_set.confidence[column].sort_values("id").reset_index(drop=True)
        if not np.array_equal(confidence["id"].to_numpy(), table["id"].to_numpy()):
            raise ValueError(f"confidence of column {column!r} does not have one row per vocabulary id in order")
        for name in CONFIDENCE_EXTRA:
            table[name] = confidence[name].to_numpy()
    names = component_names(column, matrix.shape[1])
    components = pd.DataFrame(np.asarray(matrix, dtype=np.float32), columns=names)
    return pd.concat([table, components], axis=1)


def _parquet_metadata(source: Mapping, column: str, vector_set: VectorSet) -> dict[bytes, bytes]:
    fields = {
        **{k: v if isinstance(v, str) else json.dumps(v) for k, v in source.items()},
        "column": column,
        "metadata_columns": json.dumps(metadata_columns(vector_set, column)),
        "components": json.dumps(component_names(column, vector_set.dimension(column))),
        "unknown_id": str(UNKNOWN_ID),
    }
    return {f"{METADATA_PREFIX}{k}".encode(): str(v).encode() for k, v in fields.items()}


def export_vector_set(
    vector_set: VectorSet, out: str | Path, source: Mapping[str, object] | None = None
) -> list[Path]:
    """Write every column's table as Parquet and CSV, its matrix as .npy and its vocabulary as JSON, all at once.

    ``source`` (from :func:`export_source`) says which model, version and run the files come from; without it
    the vector set's own metadata gives what it can (model name, data fingerprint).
    """
    out = Path(out)
    source = dict(source) if source else {
        "model_name": str(vector_set.metadata.get("model_name", "")),
        "data_fingerprint": str(vector_set.metadata.get("data_fingerprint", "")),
        "exported_at": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    neutralised: dict[str, int] = {}
    with OutputSet(f"the export of {source.get('model_name') or 'a vector set'}") as outputs:
        outputs.folder(out)
        for column in vector_set.columns:
            stem = column_file_stem(column)
            table = vector_table(vector_set, column)
            arrow = pa.Table.from_pandas(table, preserve_index=False)
            arrow = arrow.replace_schema_metadata(
                {**(arrow.schema.metadata or {}), **_parquet_metadata(source, column, vector_set)}
            )
            pq.write_table(arrow, outputs.path(out / f"{stem}.parquet"))
            safe, neutralised[column] = neutralise_formulas(table["category"])
            # RFC 4180 line ends (CRLF): the csv writer then quotes every cell holding a CR or LF, so a category
            # with a line break stays one cell (with "\n" alone, a bare CR went unquoted and split the row)
            table.assign(category=safe).to_csv(outputs.path(out / f"{stem}.csv"), index=False, lineterminator="\r\n")
            np.save(outputs.path(out / f"{stem}.npy"), np.asarray(vector_set.vectors[column], dtype=np.float32),
                    allow_pickle=False)
            vocabulary = {**vector_set.vocabularies[column].to_dict(), "exported_from": dict(source)}
            outputs.write_text(out / f"{stem}.vocabulary.json", json.dumps(vocabulary, ensure_ascii=False, indent=1))
        outputs.write_text(out / "manifest.json", manifest_text(vector_set, source, neutralised))
    return outputs.targets


def manifest_text(vector_set: VectorSet, source: Mapping, neutralised: Mapping[str, int]) -> str:
    """``manifest.json``: provenance, which file holds which column, its metadata columns and its components."""
    carried = ("spec_hash", "code_version")
    manifest = {
        "format": MANIFEST_FORMAT,
        **dict(source),
        **{k: vector_set.metadata[k] for k in carried if k in vector_set.metadata},
        "unknown_id": UNKNOWN_ID,
        "unknown_marker": UNKNOWN,
        "unknown_rows": "row 0 of every matrix; in the tables id 0, category = unknown_marker, is_unknown = true",
        "csv_formula_guard": {**FORMULA_GUARD, "cells_changed": dict(neutralised)},
        "columns": {
            column: {
                "dimension": vector_set.dimension(column),
                "rows": vector_set.vocabularies[column].size,
                "metadata_columns": metadata_columns(vector_set, column),
                "components": component_names(column, vector_set.dimension(column)),
                "has_confidence": column in vector_set.confidence,
                "files": {kind: f"{column_file_stem(column)}.{kind}" for kind in FILE_KINDS},
            }
            for column in vector_set.columns
        },
    }
    return json.dumps(manifest, indent=1, ensure_ascii=False, default=str)
