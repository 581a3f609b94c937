"""Out-of-fold vectors for downstream training rows: one network per fold, aligned to the full-data vectors."""

from __future__ import annotations

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import Spec
from entivec.tasks.evaluate import out_of_fold_vectors
from entivec.tasks.train import EncodedInputs, fit_network


def cross_fit_vectors(
    inputs: EncodedInputs,
    y: np.ndarray,
    spec: Spec,
    cardinalities: list[int],
    sizes: list[int],
    reference: dict[str, np.ndarray],
) -> dict[str, np.ndarray]:
    """Per embedded column, an (n_train, dim) array whose row i comes from a network that never saw row i."""
    columns = spec.embed_names
    quiet = spec.training.model_copy(update={"progress": False})

    def fit_fold(rows: np.ndarray) -> dict[str, np.ndarray]:
        subset = EncodedInputs(inputs.cat_ids[rows], inputs.dense[rows])
        result = fit_network(
            subset, y[rows], columns=columns, cardinalities=cardinalities, sizes=sizes,
            training=quiet, task=spec.target.task, label="cross-fitting",
        )
        return result.vectors

    return out_of_fold_vectors(
        inputs.cat_ids, y, columns=columns, folds=spec.evaluation.folds, seed=spec.evaluation.seed,
        fit_fold=fit_fold, reference=reference, task=spec.target.task,
    )


cross_fit_vectors_task = task(name="cross-fit-vectors", cache_policy=NO_CACHE)(cross_fit_vectors)
