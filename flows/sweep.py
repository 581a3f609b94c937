"""Embedding-size sweep: train one spec with several vector sizes side by side, and several specs at once.

``sweep`` prepares the data once (ingest, clean, split, vocabularies, encoding, exactly as ``train`` does),
then for each candidate size trains the network on all training rows and on each cross-fitting fold. Every
network is a task submitted from the flow body, so on a Dask task runner (``flows.parallel``) they run in
parallel; the results equal a sequential run bit for bit (seeded networks, fixed thread count). Each
candidate is then judged like a trained version: validation loss, the network's held-out metrics and the
downstream models' primary metric with its out-of-fold vectors. Everything goes to one MLflow parent run with
one nested run per candidate; nothing is registered.

``train_many`` runs ``train`` for several specs, each as a subflow of its own task (one Dask worker each).

Caution: a size that scores best on one split is evidence, not proof; and vectors of places or groups can
stand in for protected attributes whatever their size.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.context import FlowRunContext

from entivec import progress
from entivec.schemas.spec import Spec, TrainingSpec, embedding_size, load_spec
from entivec.tasks.evidence.crossfit import (
    TORCH_LOCK,
    fold_splitter,
    out_of_fold_vectors,
    submit_folds,
    vectors_for_ids,
)
from entivec.tasks.evidence.downstream import NON_VECTOR_SETS, capped_rows, evaluate_downstream
from entivec.tasks.evidence.metrics import task_metrics
from entivec.tasks.ingest.clean import clean
from entivec.tasks.ingest.read import ingest
from entivec.tasks.ingest.split import split
from entivec.tasks.lifecycle import registry
from entivec.tasks.train import targets
from entivec.tasks.train.encoder import EncodedInputs, FeatureEncoder
from entivec.tasks.train.network import predict
from entivec.tasks.train.trainer import fit_network
from entivec.tasks.train.vocabulary import build_vocabularies_task

SIZE_RULES = ("fourth_root", "half_capped", "power_056")
DEFAULT_CANDIDATES = ("spec", *SIZE_RULES, "x0.5", "x2")
MAX_SIZE = 600  # the spec's own upper bound for a vector length


# --- candidates -------------------------------------------------------------------------------------------------


def candidate_sizes(candidate: str, spec: Spec, cardinalities: dict[str, int]) -> list[int]:
    """Vector lengths per embedded column (spec order) for one candidate, written as one of:

    - ``spec``: the sizes the spec gives (its ``size`` or ``size_rule`` per column);
    - a size rule name (``fourth_root``, ``half_capped``, ``power_056``) applied to every column;
    - ``x<factor>`` (e.g. ``x0.5``, ``x2``): the spec's sizes times the factor, rounded, at least 1;
    - ``column=size,...`` (e.g. ``clarity=4,color=8``): explicit sizes; unnamed columns keep the spec's.
    """
    text = candidate.strip()
    base = [col.resolved_size(cardinalities[col.name]) for col in spec.columns.embed]
    if text == "spec":
        return base
    if text in SIZE_RULES:
        return [embedding_size(cardinalities[name], text) for name in spec.embed_names]
    if text.startswith("x"):
        try:
            factor = float(text[1:])
        except ValueError:
            factor = math.nan
        if not (math.isfinite(factor) and factor > 0):
            raise ValueError(f"candidate {candidate!r}: a multiplier is x followed by a positive number, e.g. x2")
        return [min(MAX_SIZE, max(1, round(size * factor))) for size in base]
    if "=" in text:
        sizes = dict(zip(spec.embed_names, base, strict=True))
        for part in text.split(","):
            name, _, value = part.partition("=")
            name = name.strip()
            if name not in sizes:
                raise ValueError(f"candidate {candidate!r}: {name!r} is not an embedded column {spec.embed_names}")
            if not value.strip().isdigit() or not 1 <= int(value) <= MAX_SIZE:
                raise ValueError(f"candidate {candidate!r}: the size of {name!r} must be a whole number 1-{MAX_SIZE}")
            sizes[name] = int(value)
        return list(sizes.values())
    raise ValueError(
        f"candidate {candidate!r} is not understood: use 'spec', a size rule {list(SIZE_RULES)}, "
        "a multiplier such as x2, or explicit sizes such as col=4,other=8"
    )


def plan_candidates(candidates: list[str], spec: Spec, cardinalities: dict[str, int]) -> list[tuple[str, list[int]]]:
    """(label, sizes) per distinct size vector, in first-seen order; candidates giving equal sizes share a line."""
    if not candidates:
        raise ValueError("a sweep needs at least one candidate")
    labels: dict[tuple[int, ...], list[str]] = {}
    for candidate in candidates:
        labels.setdefault(tuple(candidate_sizes(candidate, spec, cardinalities)), []).append(candidate.strip())
    return [(" = ".join(names), list(sizes)) for sizes, names in labels.items()]


# --- the per-candidate network ----------------------------------------------------------------------------------


@dataclass
class CandidateFit:
    """What the flow needs from a candidate's full-data network: not the network itself."""

    vectors: dict[str, np.ndarray]
    best_valid_loss: float
    best_epoch: int
    epochs_run: int
    test_pred: np.ndarray  # on the training scale (transformed target, or probability)


def fit_candidate(
    inputs: EncodedInputs,
    y: np.ndarray,
    test_inputs: EncodedInputs,
    *,
    columns: list[str],
    cardinalities: list[int],
    sizes: list[int],
    training: TrainingSpec,
    task: str,
) -> CandidateFit:
    """Train one candidate's network on all training rows; its vectors, validation loss and test predictions."""
    quiet = training.model_copy(update={"progress": False})
    with TORCH_LOCK:  # see tasks/evidence/crossfit.py: one network at a time per process
        result = fit_network(
            inputs, y, columns=columns, cardinalities=cardinalities, sizes=sizes, training=quiet, task=task,
            label="sweep",
        )
        pred = predict(result.model, test_inputs, task)
    return CandidateFit(
        result.vectors, float(result.best_valid_loss), int(result.best_epoch), len(result.history), pred
    )


fit_candidate_task = task(name="fit-candidate", cache_policy=NO_CACHE)(fit_candidate)


# --- the sweep flow ---------------------------------------------------------------------------------------------


@dataclass
class SweepOutcome:
    name: str
    run_id: str
    table: pd.DataFrame
    summary: str


def _summary(table: pd.DataFrame, primary: str, models: list[str], baselines: dict[str, tuple[str, float]]) -> str:
    best_loss = table.loc[table["valid_loss"].idxmin()]
    lines = [f"Lowest validation loss: {best_loss['candidate']} ({best_loss['sizes']}), {best_loss['valid_loss']:.6g}."]
    for model in models:
        column = f"{model}_vectors_{primary}"
        best = table.loc[table[column].idxmin()]
        name, value = baselines[model]
        lines.append(
            f"{model}: lowest {primary} with out-of-fold vectors: {best['candidate']} ({best['sizes']}), "
            f"{best[column]:.6g}; best without vectors ({name}) {value:.6g}."
        )
    lines.append(
        "One split and one seed per candidate: treat small differences as ties. Vectors of places or groups can "
        "stand in for protected attributes whatever their size."
    )
    return "\n".join(lines)


def _log_sweep(spec: Spec, spec_path: str, table: pd.DataFrame, summary: str, primary: str) -> str:
    """One parent run (the whole table) with one nested run per candidate; returns the parent's run id."""
    from mlflow.entities import Metric, Param

    c = registry.client()
    experiment_id = registry.experiment_for(spec.name)
    kind = f"{registry.TAG_PREFIX}kind"
    parent = c.create_run(
        experiment_id,
        run_name=f"sweep {spec.name} {datetime.now(UTC):%Y-%m-%d %H:%M}",
        tags={kind: "sweep", f"{registry.TAG_PREFIX}spec_hash": spec.content_hash(), "mlflow.note.content": summary},
    ).info.run_id
    with registry.ending_run(c, parent):
        c.log_param(parent, "spec_path", str(Path(spec_path).resolve()))
        c.log_param(parent, "primary_metric", primary)
        c.log_text(parent, table.to_csv(index=False), "sweep.csv")
        records = [{k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in r.items()}
                   for r in table.to_dict("records")]
        c.log_text(parent, json.dumps(records, indent=1, default=float), "sweep.json")
        stamp = int(datetime.now(UTC).timestamp() * 1000)
        for step, row in enumerate(table.to_dict("records")):
            child = c.create_run(
                experiment_id, run_name=f"sweep {row['candidate']}",
                tags={"mlflow.parentRunId": parent, kind: "sweep-candidate"},
            ).info.run_id
            params = [Param("candidate", str(row["candidate"])[:500])]
            sizes = zip(spec.embed_names, row["size_list"], strict=True)
            params += [Param(f"size.{name}", str(size)) for name, size in sizes]
            metrics = [
                Metric(key, float(value), stamp, 0) for key, value in row.items()
                if key not in ("candidate", "sizes", "size_list") and isinstance(value, (int, float))
                and math.isfinite(value)
            ]
            c.log_batch(child, params=params, metrics=metrics)
            c.set_terminated(child, status="FINISHED")
            c.log_metric(parent, "valid_loss", float(row["valid_loss"]), stamp, step)
    return parent


@flow(name="sweep", validate_parameters=False)
def sweep(spec_path: str, candidates: list[str] | None = None) -> SweepOutcome:
    """Train ``spec_path`` with each candidate vector size (see ``candidate_sizes``); compare them, register nothing."""
    spec = load_spec(spec_path)
    shown = progress.begin("read and clean")
    raw, files = ingest(spec, spec_path)
    cleaned = clean(raw, spec, files)
    shown.end(len(raw), f"{len(cleaned.frame):,} kept, {len(cleaned.quarantine):,} quarantined")
    train_rows, test_rows = split(cleaned.frame, spec.split, spec.id_name)
    vocabularies = build_vocabularies_task(train_rows, spec, None)
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    train_inputs, test_inputs = encoder.transform(train_rows), encoder.transform(test_rows)
    y_train = targets.forward(train_rows[spec.target.column].to_numpy(), spec.target.transform)
    y_test = test_rows[spec.target.column].to_numpy(dtype=float)
    targets.check_learnable(train_rows[spec.target.column].to_numpy(dtype=float), y_test, column=spec.target.column,
                            task=spec.target.task, folds=spec.evaluation.folds, files=files)
    task_kind, columns = spec.target.task, spec.embed_names
    card = {c: vocabularies[c].size for c in columns}
    cardinalities = [card[c] for c in columns]
    plans = plan_candidates(list(candidates or DEFAULT_CANDIDATES), spec, card)

    # The fold networks train on the fold sample; the downstream models take their own sample of it.
    rows = capped_rows(len(train_rows), spec.evaluation.max_fold_rows, spec.evaluation.seed)
    subset, y_subset = train_inputs.take(rows), y_train[rows]
    # The same folds out_of_fold_vectors makes (same splitter, seed and rows), so every candidate's folds can be
    # submitted before any result is awaited.
    splits = fold_splitter(task_kind, spec.evaluation.folds, spec.evaluation.seed).split(
        np.zeros((len(rows), 1)), y_subset
    )
    fold_rows = [train for train, _ in splits]
    submitted = []
    for _, sizes in plans:
        settings = dict(columns=columns, cardinalities=cardinalities, sizes=sizes, training=spec.training,
                        task=task_kind)
        full = fit_candidate_task.submit(train_inputs, y_train, test_inputs, **settings)
        submitted.append((full, submit_folds(subset, y_subset, fold_rows, **settings)))

    lines, baselines, primary = [], {}, None
    for (label, sizes), (full, folds) in zip(plans, submitted, strict=True):
        shown = progress.begin(f"candidate {label}")
        fit = full.result()

        def fold_results(asked: list[np.ndarray], folds=folds) -> list[dict[str, np.ndarray]]:
            if len(asked) != len(fold_rows) or not all(map(np.array_equal, asked, fold_rows)):
                raise RuntimeError("the folds submitted ahead differ from the folds of out_of_fold_vectors")
            return [future.result() for future in folds]

        oof = out_of_fold_vectors(
            subset.cat_ids, y_subset, columns=columns, folds=spec.evaluation.folds, seed=spec.evaluation.seed,
            fit_folds=fold_results, reference=fit.vectors, task=task_kind,
        )
        pred = targets.inverse(fit.test_pred, spec.target.transform) if task_kind == "regression" else fit.test_pred
        evidence = evaluate_downstream(
            train_rows.iloc[rows], test_rows, spec, vectors_oof=oof,
            vectors_in_sample=vectors_for_ids(subset.cat_ids, fit.vectors, columns),
            vectors_test=vectors_for_ids(test_inputs.cat_ids, fit.vectors, columns), network_test_pred=None,
        )
        primary = evidence.primary_metric
        scores = evidence.table.set_index(["model", "features"])[primary]
        line = {
            "candidate": label,
            "sizes": " ".join(f"{c}={s}" for c, s in zip(columns, sizes, strict=True)),
            "size_list": sizes,
            "embedding_parameters": int(sum(n * s for n, s in zip(cardinalities, sizes, strict=True))),
            "valid_loss": fit.best_valid_loss,
            "best_epoch": fit.best_epoch,
            "epochs_run": fit.epochs_run,
            **{f"network_{k}": v for k, v in task_metrics(task_kind, y_test, pred).items()},
        }
        for model in spec.evaluation.models:
            line[f"{model}_vectors_{primary}"] = float(scores.loc[(model, "vectors")])
            without = scores.loc[model].loc[list(NON_VECTOR_SETS)]
            baselines[model] = (str(without.idxmin()), float(without.min()))  # the same for every candidate
        lines.append(line)
        shown.end(len(train_rows), f"valid loss {fit.best_valid_loss:.4g}")

    table = pd.DataFrame(lines)
    summary = _summary(table, primary, list(spec.evaluation.models), baselines)
    run_id = _log_sweep(spec, spec_path, table, summary, primary)
    return SweepOutcome(spec.name, run_id, table.drop(columns=["size_list"]), summary)


# --- several specs at once --------------------------------------------------------------------------------------


def train_one(spec_path: str):
    """Run the train flow for one spec, as a subflow of the calling task."""
    from entivec.flows.train import train

    return train(spec_path)


train_one_task = task(name="train-spec", cache_policy=NO_CACHE)(train_one)


@flow(name="train-many", validate_parameters=False)
def train_many(spec_paths: list[str]) -> list:
    """Train several specs, each a ``train`` subflow run inside its own task, so a Dask runner runs them at once.

    Each spec must name a different model (two runs of one model would race for its ``staging`` alias). On
    Prefect's default thread-pool runner the specs run one after another: their networks share one process.
    Every worker must reach the same MLflow store and the spec files; with a local cluster they do.
    """
    names = [load_spec(p).name for p in spec_paths]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"train_many: several specs name the model(s) {repeated}; train those one at a time")
    runner = FlowRunContext.get().task_runner
    if type(runner).__name__ != "DaskTaskRunner":
        return [train_one(p) for p in spec_paths]
    futures = [
        train_one_task.with_options(task_run_name=f"train-{n}").submit(p)
        for p, n in zip(spec_paths, names, strict=True)
    ]
    return [f.result() for f in futures]
