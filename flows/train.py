"""The train flow: validated ingestion, rules, vocabulary, vectors, downstream evidence, one tracked version."""

from __future__ import annotations

import json
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

from prefect import flow, get_run_logger, task
from prefect.transactions import transaction

from entivec.schemas.spec import Spec, load_spec
from entivec.schemas.vector_set import column_file_stem
from entivec.settings import project_home
from entivec.tasks.evidence.confidence import FoldSpread, confidence_tables
from entivec.tasks.evidence.crossfit import cross_fit_vectors, vectors_for_ids
from entivec.tasks.evidence.downstream import capped_rows, evaluate_downstream
from entivec.tasks.evidence.metrics import task_metrics
from entivec.tasks.evidence.stability import seed_stability
from entivec.tasks.ingest.clean import clean
from entivec.tasks.ingest.fingerprint import data_fingerprint as fingerprint_of
from entivec.tasks.ingest.read import ingest
from entivec.tasks.ingest.split import split
from entivec.tasks.lifecycle import audit, drift, outcomes, profile, registry
from entivec.tasks.lifecycle import rows as held_rows
from entivec.tasks.lifecycle.bundle import BundleInputs, write_bundle_task
from entivec.tasks.lifecycle.track import complete_version_task, record_run_task, register_version_task
from entivec.tasks.present import plots, report, review
from entivec.tasks.train import targets
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.network import predict
from entivec.tasks.train.trainer import train_vectors
from entivec.tasks.train.vocabulary import build_vocabularies_task

RESEED = 1_000  # the seed check's network: training.seed + RESEED (fold networks use seed + 1 + fold)


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
    status: str = "trained"  # "trained" | "no-new-data" (the latest version already has this data and spec)
    note: str = ""  # what an incremental run did: drift verdict, warm start, or why it trained from scratch
    drift: dict | None = None  # the drift report against production, when one was made


@task(name="read-spec")
def read_spec(spec_path: str) -> tuple[Spec, str]:
    return load_spec(spec_path), Path(spec_path).read_text(encoding="utf-8")


@task(name="check-ledger")
def check_ledger(cleaned) -> None:
    cleaned.ledger.check(rows_used=len(cleaned.frame), rows_quarantined=len(cleaned.quarantine))


@task(name="check-store", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def check_store(name: str) -> str:
    """The tracking store answers and takes writes: found out in seconds, before minutes of training."""
    return registry.check_store(name)


@task(name="earlier-version", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def earlier_version(name: str, version_or_alias: str) -> registry.LoadedVersion:
    return registry.load_version(name, version_or_alias)


def _no_new_data(spec: Spec, same, fingerprint: dict) -> TrainOutcome:
    """The outcome of a run whose input the latest version was already trained on; recorded, nothing trained."""
    run_id = outcomes.record_skip_task(spec, str(same.version), fingerprint["sha256"])
    tags = same.tags or {}
    used = int(tags.get("entivec.rows_used", fingerprint["rows"]))
    summary = (f"no new data: version {same.version} of {spec.name} was trained on this very data with this spec; "
               f"nothing was trained (recorded in MLflow run {run_id})")
    return TrainOutcome(spec.name, str(same.version), run_id, fingerprint["rows"], used, fingerprint["rows"] - used,
                        tags.get("entivec.vectors_help") == "true", summary, status="no-new-data", note=summary)


REPORT_TAG = "entivec.report"


def publish_report_or_warn(name: str, version: str) -> str:
    """Publish the version report and the review page; a failure is a recorded warning, never a failed run.

    The version is complete and staged by then: its vectors, evidence and history do not depend on the HTML
    report, which ``entivec report NAME VERSION`` can write again. A failure is logged as a warning, tagged on
    the version (``entivec.report``) and kept as a ``report_failed`` history entry; the command exits 0.
    """
    try:
        report.publish_version_report_task(name, version)
        review.publish_review_page_task(name, version)
        return ""
    except Exception as exc:  # noqa: BLE001 - recorded below, with the way to redo it
        cause = f"{type(exc).__name__}: {str(exc).strip().splitlines()[0] if str(exc).strip() else ''}"[:400]
    warning = (f"warning: the report of {name} version {version} was not written ({cause}); the version is "
               f"registered and staged; write it with `entivec report {name} {version}`")
    get_run_logger().warning(warning)
    try:
        registry.client().set_model_version_tag(name, version, REPORT_TAG, f"failed: {cause}")
        audit.record_note(name, version, event="report_failed", reason=warning)
    except (registry.RegistryError, audit.AuditError) as exc:
        warning += f" (and the warning could not be recorded: {exc})"
    return warning


@flow(name="train", validate_parameters=False)
def train(
    spec_path: str,
    vocabulary_from: str | None = None,
    source: str | None = None,
    incremental: bool = False,
    warm_start: bool = False,
    skip_unchanged: bool = False,
) -> TrainOutcome:
    """Train a vector set from the dataset a spec describes, judge it, and register it as `staging`.

    ``vocabulary_from`` (a version number or alias of the same registered model) keeps that version's
    category ids and appends new categories after them. ``source`` reads the data from that file or glob
    instead of the spec's (a new drop). ``incremental`` reuses production's vocabulary and first checks the
    data for drift against production's training data, stopping (DriftStop, nothing registered) when the
    spec's ``drift:`` thresholds are broken; without a production version it trains from scratch and says so.
    ``warm_start`` starts the embedding tables from the vectors of the version whose vocabulary is reused.
    ``skip_unchanged`` trains nothing when the latest version has the same data fingerprint and spec hash.
    """
    if warm_start and not (incremental or vocabulary_from):
        raise ValueError("warm_start needs a version to start from: incremental=True (production) or vocabulary_from")
    spec, spec_text = read_spec(spec_path)
    check_store(spec.name)
    if source is not None:
        spec = drift.with_source(spec, source)
    raw, files = ingest(spec, spec_path)
    fingerprint = fingerprint_of(raw, files)
    if skip_unchanged:
        same = outcomes.latest_same_input_task(spec.name, fingerprint["sha256"], spec.content_hash())
        if same is not None:
            return _no_new_data(spec, same, fingerprint)
    cleaned = clean(raw, spec, files)
    check_ledger(cleaned)

    reference, drift_report, notes = None, None, []
    if incremental:
        reference = drift.load_reference_task(spec.name)
        if reference is None:
            notes.append(f"incremental: {spec.name} has no production version, so no drift check; trained from scratch")
            get_run_logger().warning(notes[-1])
        else:
            drift_report = drift.compare_task(reference, raw, cleaned.frame, spec, fingerprint["sha256"])
            drift.publish_in_prefect(drift_report)
            if not drift_report.passed:  # recorded, then stopped: production and the registry stay untouched
                stopped = outcomes.record_stop_task(spec, drift_report, fingerprint["sha256"])
                raise drift.DriftStop(drift_report, stopped)
            notes.append(f"incremental: drift against production version {reference.version} passed")
    train_rows, test_rows = split(cleaned.frame, spec.split, spec.id_name)

    start = earlier_version(spec.name, vocabulary_from) if vocabulary_from else reference
    previous = start.vector_set.vocabularies if start is not None else None
    vocabularies = build_vocabularies_task(train_rows, spec, previous)
    encoder = FeatureEncoder.fit(train_rows, spec, vocabularies)
    train_inputs, test_inputs = encoder.transform(train_rows), encoder.transform(test_rows)
    y_train = targets.forward(train_rows[spec.target.column].to_numpy(), spec.target.transform)
    y_test = test_rows[spec.target.column].to_numpy(dtype=float)
    cardinalities = [vocabularies[c].size for c in spec.embed_names]
    sizes = [col.resolved_size(vocabularies[col.name].size) for col in spec.columns.embed]
    init_vectors = None
    if warm_start and start is not None:  # ids line up: the vocabulary was extended from the same version
        init_vectors, sizes = drift.warm_start(spec, spec_path, start.vector_set, start.version, sizes)
        notes.append(f"warm start from the vectors of version {start.version}")
    elif warm_start:
        notes.append("no version to warm-start from: embedding tables start at random")

    result = train_vectors(
        train_inputs, y_train, columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes,
        training=spec.training, task=spec.target.task, init_vectors=init_vectors,
    )
    stability = {}
    if spec.evaluation.seed_check:  # the same rows and start, another seed: what a reseed alone changes
        reseeded = train_vectors.with_options(task_run_name="train-vectors-reseeded")(
            train_inputs, y_train, columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes,
            training=spec.training.model_copy(update={"seed": spec.training.seed + RESEED, "progress": False}),
            task=spec.target.task, init_vectors=init_vectors,
        )
        stability = seed_stability(vocabularies, result.vectors, reseeded.vectors)
        del reseeded
    network_pred = predict(result.model, test_inputs, spec.target.task)
    if spec.target.task == "regression":
        network_pred = targets.inverse(network_pred, spec.target.transform)
    network_metrics = task_metrics(spec.target.task, y_test, network_pred)

    # Bounded evidence: the fold networks train on a seeded sample of at most evaluation.max_fold_rows rows, the
    # downstream models on a seeded sample of that sample (max_train_rows) and are scored on a seeded sample of
    # the test rows (max_test_rows); only the downstream rows' out-of-fold vectors are kept.
    ev = spec.evaluation
    fold_rows = capped_rows(len(train_rows), ev.max_fold_rows, ev.seed)
    picked = capped_rows(len(fold_rows), ev.max_train_rows, ev.seed)
    rows = fold_rows[picked]
    tested = capped_rows(len(test_rows), ev.max_test_rows, ev.seed)
    # Folds are submitted from here, so a Dask task runner (flows.parallel) trains them in parallel.
    spread = FoldSpread()
    oof = cross_fit_vectors(train_inputs.take(fold_rows), y_train[fold_rows], spec, cardinalities, sizes,
                            result.vectors, spread=spread, keep=picked)
    confidence = confidence_tables(spread, vocabularies, result.vectors)
    in_sample = vectors_for_ids(train_inputs.cat_ids[rows], result.vectors, spec.embed_names)
    on_test = vectors_for_ids(test_inputs.cat_ids[tested], result.vectors, spec.embed_names)
    evidence = evaluate_downstream(
        train_rows.iloc[rows], test_rows.iloc[tested], spec,
        vectors_oof=oof, vectors_in_sample=in_sample, vectors_test=on_test, network_test_pred=network_pred[tested],
        n_available=len(train_rows), n_test_available=len(test_rows),
    )

    project_home().mkdir(parents=True, exist_ok=True)
    workdir = Path(tempfile.mkdtemp(prefix="run-", dir=project_home()))
    try:
        bundle = BundleInputs(
            spec, spec_text, fingerprint, cleaned.ledger, cleaned.quarantine, vocabularies, encoder,
            result, evidence, network_metrics, y_test, network_pred,
            profile=profile.data_profile_task(raw, train_rows, spec), confidence=confidence,
        )
        vector_folder = write_bundle_task(bundle, workdir)
        plots.write_run_plots(bundle, workdir)
        review.write_groups(raw, spec, workdir)  # colours of the review page's map (spec review.groups)
        if drift_report is not None:  # the check it passed travels with the run
            drift.write_report(drift_report, workdir / drift.REPORT_FOLDER)
        held_rows.write_train_ids(train_rows, spec, workdir / "data")  # lets a later gate judge only unseen rows
        metrics = {f"network_{k}": v for k, v in network_metrics.items()}
        for row in evidence.table.to_dict("records"):
            for key, value in row.items():
                if key in network_metrics:
                    metrics[f"{row['model']}_{row['features']}_{key}"] = value
        for col, figures in stability.items():  # MLflow metrics per column, e.g. seed_neighbour_overlap.dest
            metrics.update({f"{key}.{column_file_stem(col)}": value for key, value in figures.items()})
        if stability:
            (workdir / "evidence" / "seed_stability.json").write_text(json.dumps(stability, indent=1, default=float))
        if drift_report is not None:
            metrics["drift_max_psi"] = drift_report.largest("psi")
            metrics["drift_max_new_category_share"] = drift_report.largest("new_category_share")
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
            held_rows.SPEC_PATH_TAG: str(Path(spec_path).resolve()),
            **({held_rows.SOURCE_TAG: spec.source.path} if source is not None else {}),
            **({"entivec.incremental": "; ".join(notes)} if notes else {}),
            **{f"entivec.network_{k}": f"{v:.6g}" for k, v in network_metrics.items()},
        }
        # Intent first: the version is created tagged "registering" and marked complete only after its alias
        # and history entry are written. A failure in between deletes it again (rollback); a kill leaves it
        # incomplete, refused by every command and settled by the next lifecycle command.
        with transaction():
            version = register_version_task(
                spec=spec, run_id=run_id, vector_set_folder=vector_folder, version_tags=tags
            )
            audit.record_move_task(
                spec.name, registry.STAGING, version, event="train",
                reason=f"trained from {spec_path}" + "".join(f"; {n}" for n in notes),
                data_fingerprint=fingerprint["sha256"], details={"run_id": run_id, "spec_hash": spec.content_hash()},
            )
            complete_version_task(spec.name, version)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    warning = publish_report_or_warn(spec.name, version)
    if warning:
        notes.append(warning)

    return TrainOutcome(
        spec.name, version, run_id, cleaned.ledger.rows_in, cleaned.ledger.rows_used,
        cleaned.ledger.rows_quarantined, evidence.vectors_help, (evidence.summary or ""),
        note="; ".join(notes), drift=drift_report.to_dict() if drift_report is not None else None,
    )
