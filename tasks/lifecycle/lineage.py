"""MLflow's own lineage records on entivec's runs: dataset inputs, model descriptions, gate thresholds as params.

Tags already say which data a run used; these put the same facts where MLflow's UI and API look for them:

- a **dataset input** (``mlflow.data``) on every train run (context ``training``) and gate run (context
  ``evaluation``): the source as given (file or glob) and, as digest, the start of the data fingerprint
  (SHA-256 of the rows as read), with the full fingerprint and row count in the dataset's profile. Only
  metadata is logged, never the rows.
- the spec's ``description`` on the registered model and on each new version;
- the gate's thresholds (the ``promotion:`` policy that judged a version) as params of its evidence run.
"""

from __future__ import annotations

import json
import warnings
from typing import Any

from mlflow.data.dataset_source_registry import resolve_dataset_source
from mlflow.data.meta_dataset import MetaDataset
from mlflow.entities import Dataset, DatasetInput, InputTag, Param
from mlflow.tracking import MlflowClient
from mlflow.utils.mlflow_tags import MLFLOW_DATASET_CONTEXT

DIGEST_CHARS = 32  # MLflow keeps at most 36 characters of a dataset digest
PARAM_VALUE_CHARS = 6000  # MLflow's limit on a param value (6,000 characters in MLflow 2.x and 3.x)


def dataset_input(source: str, fingerprint: dict[str, Any], name: str, context: str) -> DatasetInput:
    """A metadata-only MLflow dataset for data identified by ``fingerprint`` (``sha256``, ``rows``)."""
    with warnings.catch_warnings():  # a local path matches two equivalent source kinds; MLflow warns and picks one
        warnings.simplefilter("ignore")
        where = resolve_dataset_source(str(source))
    dataset = MetaDataset(where, name=name, digest=str(fingerprint["sha256"])[:DIGEST_CHARS])
    entity = Dataset(
        name=dataset.name, digest=dataset.digest, source_type=dataset.source._get_source_type(),
        source=dataset.source.to_json(),
        profile=json.dumps({"sha256": fingerprint["sha256"], "rows": fingerprint.get("rows")}),
    )
    return DatasetInput(entity, tags=[InputTag(MLFLOW_DATASET_CONTEXT, context)])


def log_data_input(
    c: MlflowClient, run_id: str, source: str, fingerprint: dict[str, Any], name: str, context: str
) -> None:
    """Record on ``run_id`` which data it read, as an MLflow dataset input."""
    c.log_inputs(run_id, datasets=[dataset_input(source, fingerprint, name, context)])


def describe(c: MlflowClient, name: str, version: str, description: str) -> None:
    """The spec's description on the registered model and on ``version`` (nothing when it is empty)."""
    if not description.strip():
        return
    c.update_registered_model(name, description=description)
    c.update_model_version(name, version, description=description)


def _flatten(prefix: str, value: Any, out: dict[str, str]) -> None:
    if isinstance(value, dict):
        for key, item in value.items():
            _flatten(f"{prefix}.{key}" if prefix else str(key), item, out)
    elif isinstance(value, (list, tuple)):
        out[prefix] = json.dumps(value, default=str)
    else:
        out[prefix] = "null" if value is None else str(value)


def gate_params(policy: dict[str, Any], prefix: str = "promotion") -> list[Param]:
    """The gate's thresholds as MLflow params, ``promotion.<key>`` (nested keys joined with dots)."""
    flat: dict[str, str] = {}
    _flatten(prefix, policy, flat)
    return [Param(k, v[:PARAM_VALUE_CHARS]) for k, v in sorted(flat.items())]
