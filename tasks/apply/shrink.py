"""How far to trust each category's vector at apply time: the shrink rule.

The shrink rule (spec section ``shrink``, recorded in the version's ``vector_set.json`` as ``shrink``; off by
default) moves each known category's vector toward a target in proportion to its uncertainty, the relative
spread r of its aligned fold vectors (``VectorSet.confidence``): weight r² / (r² + scale²) on the target, so
a category with r = scale moves halfway; with ``replace_above`` every category whose r exceeds it (or was never
measured) takes the target itself. The target is the trained unknown row (``toward_unknown``) or the
count-weighted mean of the known vectors (``toward_mean``). ``tasks/apply/lookup.py`` applies it once per
column, before the unknown-category rule, so all three consumers apply it identically. A version without
confidence tables has nothing to shrink by and keeps its vectors.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from entivec.schemas.vocabulary import UNKNOWN_ID, Vocabulary

SHRINK_RULES = ("off", "toward_unknown", "toward_mean")


def shrink_weights(confidence: pd.DataFrame, shrink: dict) -> np.ndarray:
    """Per vocabulary id, the weight of the target in the shrunk vector (0: unchanged, 1: the target)."""
    relative = confidence["relative_spread"].to_numpy(dtype=np.float64)
    scale = float(shrink.get("scale", 1.0))
    with np.errstate(invalid="ignore"):
        weights = relative**2 / (relative**2 + scale**2)
    replace_above = shrink.get("replace_above")
    if replace_above is not None:
        weights = np.where(relative > float(replace_above), 1.0, weights)
    weights = np.where(np.isnan(relative), 1.0 if replace_above is not None else 0.0, weights)
    weights[UNKNOWN_ID] = 0.0
    return weights


def shrunk_matrix(vocabulary: Vocabulary, matrix: np.ndarray, confidence: pd.DataFrame | None,
                  shrink: dict | None) -> np.ndarray:
    """The column's matrix with the shrink rule applied (see the module notes); unchanged when it is off."""
    rule = (shrink or {}).get("rule", "off")
    if rule not in SHRINK_RULES:
        raise ValueError(f"shrink rule {rule!r} is not one of {', '.join(SHRINK_RULES)}")
    if rule == "off" or confidence is None or len(confidence) != len(matrix):
        return matrix
    vectors = np.asarray(matrix, dtype=np.float64)
    if rule == "toward_unknown":
        target = vectors[UNKNOWN_ID]
    else:
        weights = np.asarray(vocabulary.counts[1:], dtype=np.float64)
        target = (weights @ vectors[1:]) / weights.sum() if weights.sum() > 0 else vectors[1:].mean(axis=0)
    lam = shrink_weights(confidence, shrink)[:, None]
    return ((1.0 - lam) * vectors + lam * target).astype(np.float32)
