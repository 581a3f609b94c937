"""Maps and mover tables for readers: principal axes labelled with the variance they explain, new categories
marked, rare categories kept apart from the top movers.

A category's movement between two versions is mostly noise when either version saw it in few training rows, so
the movers tables list the other categories first and the rare ones apart. Rare is the comparison's own
``rare`` column when it has one (the noise-aware comparison marks it), else fewer than ``RARE_ROWS`` training
rows in either version (our default, no source; the same as the comparison's).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")  # files only, never a window

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from entivec.schemas.vocabulary import Vocabulary  # noqa: E402
from entivec.tasks.present.html import png_bytes  # noqa: E402

RARE_ROWS = 10


def principal_axes(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, first two principal axes (columns, zero-padded below two dimensions) and their explained shares."""
    x = np.asarray(points, dtype=np.float64)
    mean = x.mean(axis=0)
    _, s, vt = np.linalg.svd(x - mean, full_matrices=False)
    axes = vt[:2].T
    total = float((s**2).sum())
    explained = (s[:2] ** 2) / total if total > 0 else np.zeros(len(s[:2]))
    if axes.shape[1] < 2:
        axes = np.hstack([axes, np.zeros((axes.shape[0], 2 - axes.shape[1]))])
        explained = np.concatenate([explained, np.zeros(2 - len(explained))])
    return mean, axes, explained


def axis_label(number: int, share: float, of: str = "") -> str:
    return f"PC{number}{' of ' + of if of else ''} ({100 * share:.1f}% of the variance)"


def split_movers(movers: pd.DataFrame, min_rows: int = RARE_ROWS) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(movers that are not rare, the rare rest), order kept; see the module notes for what is rare."""
    counted = [c for c in ("count_older", "count_newer") if c in movers.columns]
    if "rare" in movers.columns and min_rows == RARE_ROWS:
        rare = movers["rare"].astype(bool)
    elif counted:
        rare = movers[counted].min(axis=1) < min_rows
    else:
        return movers, movers.iloc[0:0]
    return movers[~rare], movers[rare]


def version_map(vocabulary: Vocabulary, vectors: np.ndarray, *, new: set[str] | None = None,
                against: str = "", label_top: int = 15) -> bytes:
    """Known categories on their first two principal axes, sized by count, new ones ringed, with a legend."""
    points = np.asarray(vectors, dtype=np.float64)[1:]
    names = list(vocabulary.categories[1:])
    counts = np.asarray(vocabulary.counts[1:], dtype=float)
    fig, ax = plt.subplots(figsize=(6.5, 5.5))
    if len(points) < 2:
        ax.text(0.5, 0.5, "fewer than two known categories: nothing to map", ha="center", transform=ax.transAxes)
        return png_bytes(fig)
    mean, axes, explained = principal_axes(points)
    xy = (points - mean) @ axes
    sizes = 6 + 60 * np.sqrt(counts / max(counts.max(initial=1.0), 1.0))
    ax.scatter(xy[:, 0], xy[:, 1], s=sizes, alpha=0.6, color="#1f77b4")
    is_new = np.array([n in (new or set()) for n in names])
    if is_new.any():
        ax.scatter(xy[is_new, 0], xy[is_new, 1], s=sizes[is_new] + 40, facecolors="none", edgecolors="#116329",
                   linewidths=1.4)
    for i in np.argsort(-counts)[:label_top]:
        ax.annotate(names[i], xy[i], fontsize=7, alpha=0.85)
    handles = [Line2D([], [], marker="o", linestyle="", color="#1f77b4", alpha=0.6, markersize=m,
                      label=f"{int(c):,} training rows") for m, c in ((4, np.percentile(counts, 10)),
                                                                       (9, counts.max()))]
    if is_new.any():
        handles.append(Line2D([], [], marker="o", linestyle="", markerfacecolor="none", markeredgecolor="#116329",
                              markersize=9, label=f"new since {against} ({int(is_new.sum())})"))
    ax.legend(handles=handles, fontsize=8, loc="best", title="point area grows with rows", title_fontsize=8)
    ax.set(title=f"Vectors of '{vocabulary.column}'", xlabel=axis_label(1, explained[0]),
           ylabel=axis_label(2, explained[1]))
    return png_bytes(fig)
