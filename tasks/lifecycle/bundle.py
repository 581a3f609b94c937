"""The bundle of a train run: one local folder laid out for the tracking store, written before anything is logged."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from prefect import task

from entivec.schemas.ledger import Ledger
from entivec.schemas.spec import Spec
from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.evidence.downstream import Evidence
from entivec.tasks.ingest.clean import write_quarantine
from entivec.tasks.ingest.stream import quarantine_rows, write_quarantine_file
from entivec.tasks.lifecycle.track import write_spec_copy
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.network import save_weights
from entivec.tasks.train.trainer import TrainResult


@dataclass
class BundleInputs:
    spec: Spec
    spec_text: str | None
    fingerprint: dict
    ledger: Ledger
    quarantine: pd.DataFrame | Path  # a frame, or the quarantine.parquet a streamed run wrote
    vocabularies: dict[str, Vocabulary]
    encoder: FeatureEncoder
    result: TrainResult
    evidence: Evidence
    network_metrics: dict[str, float]
    test_actual: np.ndarray
    test_predicted: np.ndarray
    profile: dict | None = None  # what the training rows looked like, for drift checks of later data
    confidence: dict | None = None  # column -> per-category confidence table (VectorSet.confidence)
    data_path: list[str] | None = None  # a streamed run's stages (time, rows/s) and its working set's size on disk


def summary_text(b: BundleInputs) -> str:
    lines = [
        f"# {b.spec.name}: train run",
        "",
        f"Rows: {b.ledger.rows_in} in, {b.ledger.rows_used} used, {b.ledger.rows_quarantined} quarantined.",
    ]
    for reason, count in b.ledger.quarantined_by_reason().items():
        lines.append(f"- quarantined by {reason}: {count}")
    if b.data_path:
        lines += ["", "Data path (streamed):", *(f"- {line}" for line in b.data_path)]
    lines += ["", "Vocabularies and vectors:"]
    for col, vocab in b.vocabularies.items():
        lines.append(
            f"- {col}: {vocab.size - 1} categories + unknown, {b.result.vectors[col].shape[1]}-d vectors, "
            f"{vocab.counts[0]} training rows mapped to unknown"
        )
    lines += [
        "",
        f"Network: best epoch {b.result.best_epoch} of {len(b.result.history)}, "
        f"validation loss {b.result.best_valid_loss:.4g}; held-out "
        + ", ".join(f"{k} {v:.4g}" for k, v in b.network_metrics.items()),
        "",
        "Downstream evidence (same held-out rows for every line):",
        b.evidence.summary,
    ]
    return "\n".join(lines) + "\n"


def write_bundle(b: BundleInputs, folder: Path) -> Path:
    """Lay out every artifact of the run in ``folder``; returns the vector-set sub-folder."""
    folder.mkdir(parents=True, exist_ok=True)
    write_spec_copy(b.spec, b.spec_text, folder)
    (folder / "data").mkdir(exist_ok=True)
    (folder / "data" / "fingerprint.json").write_text(json.dumps(b.fingerprint, indent=1, default=str))
    (folder / "data" / "ledger.json").write_text(json.dumps(b.ledger.to_dict(), indent=1))
    if b.profile is not None:
        (folder / "data" / "profile.json").write_text(json.dumps(b.profile, indent=1, default=str))
    if isinstance(b.quarantine, Path):
        if quarantine_rows(b.quarantine):
            write_quarantine_file(b.quarantine, folder / "data")
    elif len(b.quarantine):
        write_quarantine(b.quarantine, folder / "data")

    vector_folder = folder / "vector_set"
    VectorSet(
        dict(b.vocabularies),
        dict(b.result.vectors),
        {
            "model_name": b.spec.name,
            "spec_hash": b.spec.content_hash(),
            "data_fingerprint": b.fingerprint["sha256"],
            "target": b.spec.target.model_dump(),
            "network_metrics": b.network_metrics,
            "primary_metric": b.evidence.primary_metric,
            "vectors_help": b.evidence.vectors_help,
            "shrink": b.spec.shrink.model_dump(),  # applied by every consumer (tasks/apply/lookup.py)
        },
        dict(b.confidence or {}),
    ).save(vector_folder)

    (folder / "network").mkdir(exist_ok=True)
    save_weights(b.result.model, folder / "network" / "weights.safetensors")
    (folder / "network" / "encoder.json").write_text(json.dumps(b.encoder.to_dict(), indent=1))
    (folder / "network" / "history.json").write_text(json.dumps(b.result.history, indent=1))

    (folder / "evidence").mkdir(exist_ok=True)
    b.evidence.table.to_csv(folder / "evidence" / "comparison.csv", index=False)
    (folder / "evidence" / "evidence.json").write_text(json.dumps(b.evidence.to_dict(), indent=1, default=float))

    (folder / "summary.md").write_text(summary_text(b), encoding="utf-8")
    return vector_folder


@task(name="write-bundle")
def write_bundle_task(b: BundleInputs, folder: Path) -> Path:
    return write_bundle(b, folder)
