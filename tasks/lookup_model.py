"""The registered form of a vector set: an MLflow pyfunc model whose predict maps categories to vectors."""

from __future__ import annotations

import mlflow.pyfunc
import numpy as np
import pandas as pd
from mlflow.models import ModelSignature
from mlflow.types.schema import ColSpec, Schema

from entivec.schemas.vector_set import VectorSet, component_names


class VectorLookupModel(mlflow.pyfunc.PythonModel):
    """``predict`` takes a table with some or all embedded columns and returns their vector components.

    Unknown or missing categories get the unknown row (id 0) of their column, as everywhere in entivec.
    Columns of the input that the vector set does not know are ignored; a table with none of its columns
    is an error.
    """

    def load_context(self, context) -> None:
        self.vector_set = VectorSet.load(context.artifacts["vector_set"])

    def predict(self, context, model_input: pd.DataFrame, params=None) -> pd.DataFrame:
        return lookup_frame(self.vector_set, pd.DataFrame(model_input))


def lookup_frame(vector_set: VectorSet, frame: pd.DataFrame) -> pd.DataFrame:
    columns = [c for c in vector_set.columns if c in frame.columns]
    if not columns:
        raise ValueError(
            f"input has none of the embedded columns {vector_set.columns}; it has {list(frame.columns)}"
        )
    blocks, names = [], []
    for col in columns:
        blocks.append(vector_set.lookup(col, frame[col]))
        names.extend(component_names(col, vector_set.dimension(col)))
    return pd.DataFrame(np.hstack(blocks), columns=names, index=frame.index)


def signature_for(vector_set: VectorSet) -> ModelSignature:
    inputs = Schema([ColSpec("string", col, required=False) for col in vector_set.columns])
    outputs = Schema(
        [
            ColSpec("float", name)
            for col in vector_set.columns
            for name in component_names(col, vector_set.dimension(col))
        ]
    )
    return ModelSignature(inputs=inputs, outputs=outputs)
