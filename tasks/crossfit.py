"""Out-of-fold vectors for downstream training rows: one network per fold, aligned to the full-data vectors.

Two ways to run the folds, with the same result bit for bit:

- ``cross_fit_vectors`` (and its task ``cross_fit_vectors_task``) trains the folds one after another in the
  calling process;
- ``cross_fit_vectors_submitted``, called from a flow body, submits one ``fit-fold`` task per fold to the flow's
  task runner (a Dask cluster with ``entivec.flows.parallel``) and then aligns and assembles the results in the
  flow. Tasks submitted from inside another task would not reach the flow's task runner, hence a plain function.

Each fold's network is seeded with ``training.seed`` and trains with a fixed thread count (see
``tasks.train.fit_network``), so where and in which order a fold runs does not change its vectors.
"""

from __future__ import annotations

import threading

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import Spec, TrainingSpec
from entivec.tasks.evaluate import out_of_fold_vectors
from entivec.tasks.train import EncodedInputs, fit_network

# fit_network seeds torch's global random generator and sets torch's process-wide thread count for the length
# of a run, so two fits in threads of one process would disturb each other. Runners that use threads (Prefect's
# default thread pool, a Dask worker with several threads) therefore train one network at a time per process.
TORCH_LOCK = threading.Lock()


def fit_fold(
    inputs: EncodedInputs,
    y: np.ndarray,
    rows: np.ndarray,
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
) -> dict[str, np.ndarray]:
    """Train one network on ``rows`` of ``inputs``/``y`` (without progress output); its vector matrices."""
    quiet = training.model_copy(update={"progress": False})
    with TORCH_LOCK:
        result = fit_network(
            inputs.take(rows), np.asarray(y)[rows], columns=columns, cardinalities=cardinalities, sizes=sizes,
            training=quiet, task=task, label="cross-fitting",
        )
    return result.vectors


fit_fold_task = task(name="fit-fold", cache_policy=NO_CACHE)(fit_fold)


def cross_fit_vectors(
    inputs: EncodedInputs,
    y: np.ndarray,
    spec: Spec,
    cardinalities: list[int],
    sizes: list[int],
    reference: dict[str, np.ndarray],
) -> dict[str, np.ndarray]:
    """Per embedded column, an (n_train, dim) array whose row i comes from a network that never saw row i."""
    settings = dict(
        columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes, training=spec.training,
        task=spec.target.task,
    )
    return out_of_fold_vectors(
        inputs.cat_ids, y, columns=spec.embed_names, folds=spec.evaluation.folds, seed=spec.evaluation.seed,
        fit_fold=lambda rows: fit_fold(inputs, y, rows, **settings), reference=reference, task=spec.target.task,
    )


cross_fit_vectors_task = task(name="cross-fit-vectors", cache_policy=NO_CACHE)(cross_fit_vectors)


def submit_folds(
    inputs: EncodedInputs,
    y: np.ndarray,
    fold_rows: list[np.ndarray],
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
) -> list:
    """One submitted ``fit-fold`` task per entry of ``fold_rows``; call from a flow body. Returns the futures.

    Only plain arrays and the (small) training settings travel with each task, never a closure.
    """
    return [
        fit_fold_task.with_options(task_run_name=f"fit-fold-{i}").submit(
            inputs, y, rows, columns=columns, cardinalities=cardinalities, sizes=sizes, training=training, task=task,
        )
        for i, rows in enumerate(fold_rows)
    ]


def cross_fit_vectors_submitted(
    inputs: EncodedInputs,
    y: np.ndarray,
    spec: Spec,
    cardinalities: list[int],
    sizes: list[int],
    reference: dict[str, np.ndarray],
) -> dict[str, np.ndarray]:
    """The same as ``cross_fit_vectors``, with every fold submitted to the running flow's task runner at once.

    Call it from a flow body (not from a task). The folds run in parallel on a Dask task runner; on Prefect's
    default thread-pool runner they run one after another (see ``TORCH_LOCK``).
    """
    y = np.asarray(y)
    settings = dict(
        columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes, training=spec.training,
        task=spec.target.task,
    )

    def fit_folds(fold_rows: list[np.ndarray]) -> list[dict[str, np.ndarray]]:
        return [future.result() for future in submit_folds(inputs, y, fold_rows, **settings)]

    return out_of_fold_vectors(
        inputs.cat_ids, y, columns=spec.embed_names, folds=spec.evaluation.folds, seed=spec.evaluation.seed,
        fit_folds=fit_folds, reference=reference, task=spec.target.task,
    )
