"""The file MLflow runs to build the lookup model when a registered version is loaded: code, not a pickle."""

import mlflow.models

from entivec.tasks.apply.served import VectorLookupModel

mlflow.models.set_model(VectorLookupModel())
