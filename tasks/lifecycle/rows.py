"""Which rows a version trained on, and which rows a gate may judge it on: the held-out rows neither version saw."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from entivec.schemas.spec import Spec, SpecError, load_spec
from entivec.schemas.vocabulary import category_strings
from entivec.tasks.evidence.downstream import (
    capped_rows,
)
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.checks import (
    Check,
)
from entivec.tasks.lifecycle.registry import run_file, version_spec

TRAIN_IDS_ARTIFACT = "data/train_ids.parquet"
SPEC_PATH_TAG = "entivec.spec_path"
SOURCE_TAG = "entivec.source"  # set when a run read a data drop named apart from its spec (train --source)


def id_strings(values: pd.Series) -> pd.Series:
    """Ids spelled one way for comparing across files and versions (the same spelling as categories)."""
    return category_strings(values)


def write_train_ids(train_rows: pd.DataFrame | Iterable[pd.DataFrame], spec: Spec, folder: str | Path) -> Path:
    """Record the ids of the rows a version trained on (``folder`` is the run bundle's ``data/`` folder).

    ``train_rows`` is the training frame or, for a streamed run, its batches in order: every id is written (a
    gate must leave out every row a version saw, so a sample would not do), one batch in memory at a time.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / Path(TRAIN_IDS_ARTIFACT).name
    if isinstance(train_rows, pd.DataFrame):
        pd.DataFrame({"id": id_strings(train_rows[spec.id_name])}).to_parquet(path, index=False)
        return path
    writer = None
    try:
        for frame in train_rows:
            table = pa.Table.from_pandas(pd.DataFrame({"id": id_strings(frame[spec.id_name])}), preserve_index=False)
            writer = writer or pq.ParquetWriter(path, table.schema)
            writer.write_table(table.cast(writer.schema))
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        pd.DataFrame({"id": pd.Series([], dtype="string")}).to_parquet(path, index=False)
    return path




def trained_ids(version: registry.LoadedVersion) -> pd.Index | None:
    """Ids of the rows the version trained on, when its run recorded them."""
    path = run_file(version.run_id, TRAIN_IDS_ARTIFACT)
    if path is None or not path.exists():
        return None
    return pd.Index(pd.read_parquet(path)["id"].astype("string").dropna().unique())


def spec_for(
    name: str, candidate: registry.LoadedVersion, spec_path: str | None, source: str | None = None
) -> tuple[Spec, str]:
    """The spec to read the newest data with: ``spec_path``, else the one the candidate was trained from.

    The data location is ``source`` when given; else, when the spec is the candidate's own and its train run read
    a drop named apart from the spec (``train --source``), that drop; else the spec's own ``source``.
    """
    recorded_source = None
    if spec_path is None:
        c = registry.client()
        version_tags = c.get_model_version(name, candidate.version).tags
        recorded = version_tags.get(SPEC_PATH_TAG) or c.get_run(candidate.run_id).data.tags.get(SPEC_PATH_TAG)
        recorded_source = version_tags.get(SOURCE_TAG)
        if not recorded or not Path(recorded).exists():
            where = f" (recorded: {recorded}, not found)" if recorded else ""
            raise SpecError(
                f"no spec file for {name!r} version {candidate.version}{where}; pass --spec PATH to name the "
                "dataset spec whose data the gate should judge on"
            )
        spec_path = recorded
    spec = load_spec(spec_path)
    if spec.name != name:
        raise SpecError(f"spec file {spec_path} describes model {spec.name!r}, not {name!r}")
    if source or recorded_source:
        spec = spec.with_source(source or recorded_source)
    return spec, str(spec_path)


@dataclass
class JudgedRows:
    frame: pd.DataFrame
    held_out: int
    notes: dict[str, str]
    checks: list[Check]


def unseen_rows(
    test_rows: pd.DataFrame,
    spec: Spec,
    versions: dict[str, registry.LoadedVersion],
    data_fingerprint: str,
) -> JudgedRows:
    """The held-out rows no judged version trained on, and how that was established for each version."""
    ids = id_strings(test_rows[spec.id_name])
    keep = np.ones(len(test_rows), dtype=bool)
    notes, checks = {}, []
    policy = spec.promotion
    for label, version in versions.items():
        seen = trained_ids(version)
        if seen is not None:
            overlap = ids.isin(seen).to_numpy()
            keep &= ~overlap
            notes[label] = f"version {version.version}: {int(overlap.sum())} held-out row(s) it trained on left out"
            checks.append(Check("rows", f"rows unseen by {label}", True, notes[label],
                                {"excluded": int(overlap.sum()), "method": "training ids"}))
            continue
        earlier = version_spec(version)
        fingerprint = registry.client().get_model_version(version.name, version.version).tags.get(
            f"{registry.TAG_PREFIX}data_fingerprint", version.vector_set.metadata.get("data_fingerprint", ""))
        same = (fingerprint == data_fingerprint and earlier is not None
                and earlier.split == spec.split and earlier.rules == spec.rules)
        if same:
            notes[label] = (f"version {version.version}: trained on this very data with the same rules and split, so "
                            "these held-out rows are its own held-out rows")
            checks.append(Check("rows", f"rows unseen by {label}", True, notes[label], {"method": "same data"}))
        else:
            notes[label] = (f"version {version.version}: its training rows were not recorded and it was trained on "
                            "other data or another split, so it may have trained on some of these rows")
            checks.append(Check("rows", f"rows unseen by {label}", False if policy.require_unseen_rows else None,
                                notes[label] + ("" if policy.require_unseen_rows
                                                else " (promotion.require_unseen_rows is off)"),
                                {"method": "unverified"}))
    frame = test_rows[keep].reset_index(drop=True)
    if policy.max_eval_rows is not None and len(frame) > policy.max_eval_rows:
        frame = frame.iloc[capped_rows(len(frame), policy.max_eval_rows, policy.seed)].reset_index(drop=True)
    enough = len(frame) >= policy.min_eval_rows
    checks.append(Check("rows", "enough judged rows", enough,
                        f"{len(frame)} held-out row(s) judged of {len(test_rows)} (required at least "
                        f"{policy.min_eval_rows})", {"rows": len(frame), "held_out": len(test_rows)}))
    return JudgedRows(frame, len(test_rows), notes, checks)
