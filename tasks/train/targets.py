"""The spec's target transform, both ways: models learn on the transformed scale, metrics use the original."""

from __future__ import annotations

import numpy as np


def forward(y: np.ndarray, transform: str) -> np.ndarray:
    y = np.asarray(y, dtype=np.float64)
    if transform == "none":
        return y
    if transform == "log":
        if np.any(y <= 0):
            raise ValueError("target transform 'log' needs a target above 0 on every row; use 'log1p' or a range rule")
        return np.log(y)
    if transform == "log1p":
        if np.any(y <= -1):
            raise ValueError("target transform 'log1p' needs a target above -1 on every row")
        return np.log1p(y)
    raise ValueError(f"unknown target transform {transform!r}")


def inverse(z: np.ndarray, transform: str) -> np.ndarray:
    z = np.asarray(z, dtype=np.float64)
    if transform == "none":
        return z
    if transform == "log":
        return np.exp(z)
    if transform == "log1p":
        return np.expm1(z)
    raise ValueError(f"unknown target transform {transform!r}")
