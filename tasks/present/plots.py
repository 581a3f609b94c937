"""Plots of a train run: loss curves, predicted against actual, a 2-D map of each column's vectors, the comparison."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # files only, never a window

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from entivec.schemas.vocabulary import Vocabulary  # noqa: E402
from entivec.tasks.lifecycle.bundle import BundleInputs  # noqa: E402
from entivec.tasks.present.maps import axis_label, principal_axes  # noqa: E402


def _save(fig, path: Path) -> Path:
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def loss_curves(history: list[dict], best_epoch: int, path: Path) -> Path:
    fig, ax = plt.subplots(figsize=(6, 4))
    epochs = [h["epoch"] for h in history]
    ax.plot(epochs, [h["train_loss"] for h in history], label="training")
    ax.plot(epochs, [h["valid_loss"] for h in history], label="validation")
    ax.axvline(best_epoch, color="grey", linestyle=":", label=f"best epoch ({best_epoch})")
    ax.set(xlabel="epoch", ylabel="loss", title="Loss by epoch")
    ax.legend()
    return _save(fig, path)


def predicted_vs_actual(y_true: np.ndarray, y_pred: np.ndarray, task: str, path: Path) -> Path:
    fig, ax = plt.subplots(figsize=(5, 5))
    if task == "regression":
        ax.scatter(y_true, y_pred, s=4, alpha=0.3)
        lo, hi = float(np.nanmin(y_true)), float(np.nanmax(y_true))
        ax.plot([lo, hi], [lo, hi], color="black", linewidth=1)
        ax.set(xlabel="actual", ylabel="predicted", title="Network on held-out rows")
    else:
        # Calibration: mean outcome per predicted-probability decile.
        bins = np.clip((np.asarray(y_pred) * 10).astype(int), 0, 9)
        frame = pd.DataFrame({"bin": bins, "p": y_pred, "y": y_true}).groupby("bin").mean()
        ax.plot(frame["p"], frame["y"], marker="o")
        ax.plot([0, 1], [0, 1], color="black", linewidth=1)
        ax.set(xlabel="predicted probability", ylabel="observed share", title="Calibration on held-out rows")
    return _save(fig, path)


def vector_map(vocabulary: Vocabulary, vectors: np.ndarray, path: Path, label_top: int = 25) -> Path:
    """Known categories on their first two principal components (with the variance each explains), sized by
    count; the unknown row marked."""
    every = np.asarray(vectors, dtype=np.float64)
    # axes of the known categories (the unknown row is drawn on them but does not shape them)
    mean, axes, explained = principal_axes(every[1:] if len(every) >= 3 else every)
    points = (every - mean) @ axes
    counts = np.asarray(vocabulary.counts, dtype=float)
    sizes = 6 + 60 * np.sqrt(counts / max(counts[1:].max(initial=1.0), 1.0))
    fig, ax = plt.subplots(figsize=(6.5, 5.5))
    ax.scatter(points[1:, 0], points[1:, 1], s=sizes[1:], alpha=0.6)
    ax.scatter(points[0, 0], points[0, 1], marker="x", color="red", s=60, label="unknown (id 0)")
    for i in np.argsort(-counts[1:])[:label_top] + 1:
        ax.annotate(vocabulary.categories[i], points[i], fontsize=7, alpha=0.8)
    ax.scatter([], [], s=20, alpha=0.6, color="C0", label="a category (area grows with its training rows)")
    ax.set(title=f"Vectors of '{vocabulary.column}' (first two principal components)",
           xlabel=axis_label(1, explained[0]), ylabel=axis_label(2, explained[1]))
    ax.legend(loc="best", fontsize=8)
    return _save(fig, path)


def comparison(table: pd.DataFrame, metric: str, path: Path) -> Path:
    """Held-out metric per downstream model and feature set (lower is better)."""
    pivot = table.pivot_table(index="features", columns="model", values=metric, aggfunc="first")
    fig, ax = plt.subplots(figsize=(7, 4.5))
    pivot.plot.barh(ax=ax)
    ax.set(xlabel=f"{metric} on held-out rows (lower is better)", ylabel="", title="Downstream comparison")
    return _save(fig, path)


def write_run_plots(b: BundleInputs, folder: Path) -> None:
    """The train run's plots into ``folder/plots``: loss curves, predicted vs actual, vector maps, the comparison."""
    plot_dir = folder / "plots"
    plot_dir.mkdir(parents=True, exist_ok=True)
    loss_curves(b.result.history, b.result.best_epoch, plot_dir / "loss_curves.png")
    predicted_vs_actual(b.test_actual, b.test_predicted, b.spec.target.task, plot_dir / "predicted_vs_actual.png")
    for col, vocab in b.vocabularies.items():
        vector_map(vocab, b.result.vectors[col], plot_dir / f"vectors_{col}.png")
    comparison(b.evidence.table, b.evidence.primary_metric, plot_dir / "downstream_comparison.png")
