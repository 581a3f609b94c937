"""The train flow: validated ingestion, rules, vocabulary, vectors, downstream evidence, one tracked version."""

from __future__ import annotations

import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

from prefect import flow, task
from prefect.transactions import transaction

from entivec.schemas.spec import Spec, load_spec
from entivec.settings import project_home
from entivec.tasks import audit, gate, registry, report, targets
from entivec.tasks.bundle import BundleInputs, write_bundle_task
from entivec.tasks.crossfit import cross_fit_vectors_task
from entivec.tasks.evaluate import capped_rows, evaluate_downstream, vectors_for_ids
from entivec.tasks.ingest import clean, ingest, split
from entivec.tasks.ingest import data_fingerprint as fingerprint_of
from entivec.tasks.metrics import task_metrics
from entivec.tasks.track import record_run_task, register_version_task
from entivec.tasks.train import FeatureEncoder, predict, train_vectors
from entivec.tasks.vocabulary import build_vocabularies_task


@dataclass
class TrainOutcome:
    name: str
    version: str
    run_id: str
    rows_in: int
    rows_used: int
    rows_quarantined: int
    vectors_help: bool
    summary: str


@task(name="read-spec")
def read_spec(spec_path: str) -> tuple[Spec, str]:
    return load_spec(spec_path), Path(spec_path).read_text(encoding="utf-8")


@task(name="check-ledger")
def check_ledger(cleaned) -> None:
    cleaned.ledger.check(rows_used=len(cleaned.frame), rows_quarantined=len(cleaned.quarantine))


@task(name="earlier-vocabularies", retries=2, retry_delay_seconds=2)
def earlier_vocabularies(name: str, version_or_alias: str):
    return registry.load_version(name, version_or_alias).vector_set.vocabularies


@flow(name="train", validate_parameters=False)
def train(spec_path: str, vocabulary_from: str | None = None) -> TrainOutcome:
    """Train a vector set from the dataset a spec describes, judge it, and register it as `staging`.

    ``vocabulary_from`` (a version number or alias of the same registered model) keeps that version's
    category ids and appends new categories after them.
    """
    spec, spec_text = read_spec(spec_path)
    raw, files = ingest(spec, spec_path)
    fingerprint = fingerprint_of(raw, files)
    cleaned = clean(raw, spec, files)
    check_ledger(cleaned)
    train_rows, test_rows = split(cleaned.frame, spec.split)

    previous = earlier_vocabularies(spec.name, vocabulary_from) if vocabulary_from else None
    vocabularies = build_vocabularies_task(train_rows, spec, previous)
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    train_inputs, test_inputs = encoder.transform(train_rows), encoder.transform(test_rows)
    y_train = targets.forward(train_rows[spec.target.column].to_numpy(), spec.target.transform)
    y_test = test_rows[spec.target.column].to_numpy(dtype=float)
    cardinalities = [vocabularies[c].size for c in spec.embed_names]
    sizes = [col.resolved_size(vocabularies[col.name].size) for col in spec.columns.embed]

    result = train_vectors(
        train_inputs, y_train, columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes,
        training=spec.training, task=spec.target.task,
    )
    network_pred = predict(result.model, test_inputs, spec.target.task)
    if spec.target.task == "regression":
        network_pred = targets.inverse(network_pred, spec.target.transform)
    network_metrics = task_metrics(spec.target.task, y_test, network_pred)

    rows = capped_rows(len(train_rows), spec.evaluation.max_train_rows, spec.evaluation.seed)
    subset = train_inputs.take(rows)
    oof = cross_fit_vectors_task(subset, y_train[rows], spec, cardinalities, sizes, result.vectors)
    in_sample = vectors_for_ids(subset.cat_ids, result.vectors, spec.embed_names)
    on_test = vectors_for_ids(test_inputs.cat_ids, result.vectors, spec.embed_names)
    evidence = evaluate_downstream(
        train_rows.iloc[rows], test_rows, spec,
        vectors_oof=oof, vectors_in_sample=in_sample, vectors_test=on_test, network_test_pred=network_pred,
    )

    project_home().mkdir(parents=True, exist_ok=True)
    workdir = Path(tempfile.mkdtemp(prefix="run-", dir=project_home()))
    try:
        bundle = BundleInputs(
            spec, spec_text, fingerprint, cleaned.ledger, cleaned.quarantine, vocabularies, encoder,
            result, evidence, network_metrics, y_test, network_pred,
        )
        vector_folder = write_bundle_task(bundle, workdir)
        gate.write_train_ids(train_rows, spec, workdir / "data")  # lets a later gate judge only unseen rows
        metrics = {f"network_{k}": v for k, v in network_metrics.items()}
        for row in evidence.table.to_dict("records"):
            for key, value in row.items():
                if key in network_metrics:
                    metrics[f"{row['model']}_{row['features']}_{key}"] = value
        run_id = record_run_task(
            spec=spec, bundle=workdir, fingerprint=fingerprint, ledger=cleaned.ledger.to_dict(),
            history=result.history, metrics=metrics, summary=(workdir / "summary.md").read_text(),
        )
        tags = {
            "entivec.data_fingerprint": fingerprint["sha256"],
            "entivec.spec_hash": spec.content_hash(),
            "entivec.rows_used": str(cleaned.ledger.rows_used),
            "entivec.primary_metric": evidence.primary_metric,
            "entivec.vectors_help": str(evidence.vectors_help).lower(),
            gate.SPEC_PATH_TAG: str(Path(spec_path).resolve()),
            **{f"entivec.network_{k}": f"{v:.6g}" for k, v in network_metrics.items()},
        }
        with transaction():
            version = register_version_task(
                spec=spec, run_id=run_id, vector_set_folder=vector_folder, version_tags=tags
            )
            audit.record_move_task(
                spec.name, registry.STAGING, version, event="train", reason=f"trained from {spec_path}",
                data_fingerprint=fingerprint["sha256"], details={"run_id": run_id, "spec_hash": spec.content_hash()},
            )
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    report.publish_version_report_task(spec.name, version)

    return TrainOutcome(
        spec.name, version, run_id, cleaned.ledger.rows_in, cleaned.ledger.rows_used,
        cleaned.ledger.rows_quarantined, evidence.vectors_help, (evidence.summary or ""),
    )
