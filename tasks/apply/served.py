"""The registered lookup model: an MLflow pyfunc that returns the vectors of a table of categories.

It is logged as code (``lookup_model_entry.py``), never as a pickle, and turns categories into vectors
through the same :class:`~entivec.tasks.apply.lookup.ColumnLookup` as the transformer and the batch job.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from contextlib import contextmanager

import mlflow.pyfunc
import pandas as pd
from mlflow.exceptions import MlflowException
from mlflow.models import ModelSignature
from mlflow.protos.databricks_pb2 import INVALID_PARAMETER_VALUE
from mlflow.types.schema import ColSpec, ParamSchema, ParamSpec, Schema

from entivec.schemas.vector_set import VectorSet, component_names
from entivec.tasks.apply.lookup import (
    DEFAULT_UNKNOWN,
    CategoryTypeError,
    ColumnLookup,
    category_type_problem,
    check_unknown_rule,
    pandas_kind,
    prepare,
)


class VectorLookupModel(mlflow.pyfunc.PythonModel):
    """``predict`` takes a table with some or all embedded columns and returns their vector components.

    Output columns are ``<column>__vec<i>`` (float32) for each embedded column present, in the vector set's
    column order. Unknown or missing categories follow the unknown-category rule of this module, chosen
    with the inference parameter ``unknown`` (default ``"unknown_row"``). Columns of the input that the
    vector set does not know are ignored; a table with none of its columns is an error.
    """

    def load_context(self, context) -> None:
        self.vector_set = VectorSet.load(context.artifacts["vector_set"])
        self._lookups: dict[str, dict[str, ColumnLookup]] = {}

    def predict(self, context, model_input: pd.DataFrame, params: dict | None = None) -> pd.DataFrame:
        try:
            unknown = check_unknown_rule((params or {}).get("unknown") or DEFAULT_UNKNOWN)
            if unknown not in self._lookups:
                self._lookups[unknown] = prepare(self.vector_set, unknown=unknown)
            frame = pd.DataFrame(model_input)
            return lookup_frame(self.vector_set, frame, unknown, lookups=self._lookups[unknown])
        except (ValueError, TypeError) as exc:  # the caller's input: a 400 answer that says what is wrong
            raise MlflowException(str(exc), error_code=INVALID_PARAMETER_VALUE) from exc


def lookup_frame(
    vector_set: VectorSet,
    frame: pd.DataFrame,
    unknown: str = DEFAULT_UNKNOWN,
    *,
    lookups: dict[str, ColumnLookup] | None = None,
) -> pd.DataFrame:
    """The vector components of every embedded column present in ``frame``, one row per input row."""
    columns = [c for c in vector_set.columns if c in frame.columns]
    if not columns:
        raise ValueError(
            f"input has none of the embedded columns {vector_set.columns}; it has {list(frame.columns)}"
        )
    lookups = lookups if lookups is not None else prepare(vector_set, columns, unknown)
    blocks = []
    for col in columns:
        lookup = lookups[col]
        problem = category_type_problem(pandas_kind(frame[col].dtype), str(frame[col].dtype), lookup.vocabulary)
        if problem:
            raise CategoryTypeError(f"column {col!r} {problem}")
        ids = lookup.ids(frame[col])
        lookup.check_known(ids, frame[col])
        blocks.append(pd.DataFrame(lookup.vectors(ids).T, columns=lookup.names, index=frame.index, copy=False))
    return pd.concat(blocks, axis=1) if len(blocks) > 1 else blocks[0]


@contextmanager
def example_warnings_quiet() -> Iterator[None]:
    """While logging the model: MLflow's saving of a table example compares columns with a ``range``, which
    pandas 3 flags as deprecated on every call. Nothing of ours to fix; keep it out of each train's output."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Operation with range is deprecated")
        yield


def input_example_for(vector_set: VectorSet, rows: int = 2) -> pd.DataFrame:
    """A small table of known categories (the first ids of each column) that ``predict`` accepts as is.

    Logged with the model, it shows a user what the input looks like and lets MLflow check the signature
    against a real call; it holds only category labels, never a row of training data.
    """
    example = {}
    for col in vector_set.columns:
        known = vector_set.vocabularies[col].categories[1 : rows + 1] or [None]
        example[col] = [known[i % len(known)] for i in range(rows)]
    return pd.DataFrame(example, dtype=object)


def signature_for(vector_set: VectorSet) -> ModelSignature:
    inputs = Schema([ColSpec("string", col, required=False) for col in vector_set.columns])
    outputs = Schema(
        [
            ColSpec("float", name)
            for col in vector_set.columns
            for name in component_names(col, vector_set.dimension(col))
        ]
    )
    params = ParamSchema([ParamSpec("unknown", "string", DEFAULT_UNKNOWN)])
    return ModelSignature(inputs=inputs, outputs=outputs, params=params)
