"""A profile of the data a version trained on, and the population stability index that compares two of them.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import Spec
from entivec.schemas.vocabulary import category_strings
from entivec.tasks.ingest.common import KindTally, value_kind  # noqa: F401 - kept importable from here
from entivec.tasks.ingest.read import BOOKKEEPING

PROFILE_FORMAT = "entivec.data_profile/1"
PROFILE_ARTIFACT = "data/profile.json"
FINGERPRINT_ARTIFACT = "data/fingerprint.json"

EPSILON = 1e-4

MISSING_BIN = "(missing)"
OTHER_BIN = "(other known categories)"
# Common practice, no source: how PSI values are usually read.
PSI_STABLE, PSI_MAJOR = 0.1, 0.25
PSI_READING = "PSI below 0.1 reads as stable, 0.1-0.25 as a moderate shift, above 0.25 as a major shift " \
              "(common practice, no source)"


# --- the index itself -------------------------------------------------------------------------------------------


def psi(expected: Any, actual: Any, epsilon: float = EPSILON) -> float:
    """Population stability index of two binned distributions: counts or shares over the same bins, same order.

    ``expected`` is the reference (production's training rows), ``actual`` the new data. Bins empty on both sides
    are dropped; a share of 0 on one side is raised to ``epsilon`` and the shares renormalised.
    """
    e = np.asarray(expected, dtype="float64").ravel()
    a = np.asarray(actual, dtype="float64").ravel()
    if e.shape != a.shape:
        raise ValueError(f"psi needs the same bins on both sides, got {e.size} and {a.size}")
    if (e < 0).any() or (a < 0).any() or not (np.isfinite(e).all() and np.isfinite(a).all()):
        raise ValueError("psi needs finite, non-negative counts or shares")
    keep = (e > 0) | (a > 0)
    e, a = e[keep], a[keep]
    if e.sum() == 0 or a.sum() == 0:
        raise ValueError("psi needs at least one row on each side")
    e, a = np.maximum(e / e.sum(), epsilon), np.maximum(a / a.sum(), epsilon)
    e, a = e / e.sum(), a / a.sum()
    return float(np.sum((a - e) * np.log(a / e)))


def psi_reading(value: float | None) -> str:
    if value is None or not math.isfinite(value):
        return "not profiled"
    if value < PSI_STABLE:
        return "stable"
    return "moderate" if value <= PSI_MAJOR else "major"


# --- the profile written at training ----------------------------------------------------------------------------


def column_roles(spec: Spec) -> dict[str, str]:
    """Each column the spec names, with its role."""
    roles = {spec.id_name: "id", spec.target.column: "target"}
    roles |= {c: "embed" for c in spec.embed_names}
    roles |= {c: "onehot" for c in spec.onehot_names}
    roles |= {c: "numeric" for c in spec.numeric_names}
    if spec.split.time_column:
        roles.setdefault(spec.split.time_column, "time")
    return roles


def numbers(values: pd.Series) -> np.ndarray:
    out = pd.to_numeric(values, errors="coerce")
    return np.asarray(out.to_numpy(dtype="float64", na_value=np.nan), dtype="float64")


def numeric_profile(values: pd.Series, bins: int) -> dict[str, Any]:
    """Quantile bin edges of the values, rows per bin and missing rows; bins are right-closed, ends open."""
    x = numbers(values)
    present = np.isfinite(x)
    finite = x[present]
    if len(finite):
        # Tied quantiles (a value that fills several bins) collapse into one edge.
        edges = np.unique(np.quantile(finite, np.linspace(0, 1, bins + 1)[1:-1]))
    else:
        edges = np.zeros(0)
    counts = np.bincount(np.searchsorted(edges, finite, side="left"), minlength=len(edges) + 1)
    return {
        "kind": "numeric",
        "rows": int(len(x)),
        "missing": int((~present).sum()),
        "edges": [float(v) for v in edges],
        "counts": [int(v) for v in counts],
        "min": float(finite.min()) if len(finite) else None,
        "max": float(finite.max()) if len(finite) else None,
        "mean": float(finite.mean()) if len(finite) else None,
    }


def category_profile(values: pd.Series) -> dict[str, Any]:
    strings = category_strings(values)
    counts = strings.value_counts(dropna=True)
    return {
        "kind": "categorical",
        "rows": int(len(strings)),
        "missing": int(strings.isna().sum()),
        "counts": {str(k): int(v) for k, v in counts.items()},
    }


def data_columns(raw: pd.DataFrame | dict[str, str]) -> dict[str, str]:
    """Each data column's kind as read (bookkeeping columns left out); a dict of kinds is taken as it is."""
    if isinstance(raw, dict):
        return dict(raw)
    return {str(c): value_kind(raw[c]) for c in raw.columns if c not in BOOKKEEPING}


def data_profile(raw: pd.DataFrame | dict[str, str], rows: pd.DataFrame, spec: Spec,
                 vocabularies: dict | None = None) -> dict[str, Any]:
    """The profile of the rows a version trains on (``rows``), with the types of every column as read (``raw``, or
    the kinds a streamed read tallied).

    ``rows`` may be a seeded sample of the training rows (a streamed run): bins, shares and category counts are
    then the sample's. With ``vocabularies`` (built from every training row), the embedded columns' row and
    missing counts come from them, so they agree with the vocabulary counts a drift check compares against.
    """
    columns: dict[str, dict[str, Any]] = {}
    for name in spec.embed_names:
        if vocabularies is not None:
            vocab = vocabularies[name]
            columns[name] = {"kind": "categorical", "rows": int(sum(vocab.counts)), "missing": int(vocab.unknown_count),
                             "counts_in": "vocabulary"}
            continue
        strings = category_strings(rows[name])
        columns[name] = {"kind": "categorical", "rows": int(len(strings)), "missing": int(strings.isna().sum()),
                         "counts_in": "vocabulary"}
    for name in spec.onehot_names:
        columns[name] = category_profile(rows[name])
    for name in [*spec.numeric_names, spec.target.column]:
        columns[name] = numeric_profile(rows[name], spec.drift.numeric_bins)
    trained = int(sum(vocabularies[spec.embed_names[0]].counts)) if vocabularies and spec.embed_names else len(rows)
    out = {
        "format": PROFILE_FORMAT,
        "rows": int(trained),
        "data_columns": data_columns(raw),
        "roles": column_roles(spec),
        "columns": columns,
    }
    if trained != len(rows):
        out["sample_rows"] = int(len(rows))
    return out


@task(name="profile-data", cache_policy=NO_CACHE)
def data_profile_task(raw: pd.DataFrame | dict[str, str], rows: pd.DataFrame, spec: Spec,
                      vocabularies: dict | None = None) -> dict[str, Any]:
    return data_profile(raw, rows, spec, vocabularies)
