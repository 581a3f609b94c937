"""The train flow: streamed, validated ingestion, rules, vocabulary, vectors, downstream evidence, one tracked version.

The data path is a stream at any size (see :func:`train`)."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from prefect import flow, get_run_logger, task
from prefect.cache_policies import NO_CACHE
from prefect.transactions import transaction

from entivec import progress
from entivec.flows.parallel import flow_dask_client
from entivec.schemas.spec import Spec, load_spec
from entivec.schemas.vector_set import column_file_stem
from entivec.settings import project_home
from entivec.tasks.evidence.confidence import FoldSpread, confidence_tables
from entivec.tasks.evidence.crossfit import cross_fit_vectors, vectors_for_ids
from entivec.tasks.evidence.downstream import capped_rows, evaluate_downstream
from entivec.tasks.evidence.metrics import task_metrics
from entivec.tasks.evidence.stability import seed_stability
from entivec.tasks.ingest.partitioned import MERGE, Mapper, dask_mapper, in_process, stream_clean_parts
from entivec.tasks.ingest.read import InputError, retry_on_io_only
from entivec.tasks.ingest.stream import (
    BATCH_ROWS,
    QUARANTINE,
    FirstPass,
    StreamedTable,
    cleaned_rows,
    first_pass,
    keep_quarantine,
    quarantine_rows,
    stream_clean,
)
from entivec.tasks.ingest.workdir import size_on_disk, working_set
from entivec.tasks.lifecycle import audit, drift, outcomes, profile, registry
from entivec.tasks.lifecycle import rows as held_rows
from entivec.tasks.lifecycle.bundle import BundleInputs, write_bundle_task
from entivec.tasks.lifecycle.track import complete_version_task, record_run_task, register_version_task
from entivec.tasks.present import plots, report, review
from entivec.tasks.present.review import GroupTally
from entivec.tasks.train import targets
from entivec.tasks.train.network import predict
from entivec.tasks.train.streamfit import fit_from_working_set
from entivec.tasks.train.targets import distinct_values
from entivec.tasks.train.trainer import train_vectors
from entivec.tasks.train.workset import WorkingSet, build_working_set

RESEED = 1_000  # the seed check's network: training.seed + RESEED (fold networks use seed + 1 + fold)
# Up to this many training rows the network trains from the encoded arrays in memory, as a table read whole
# always did (the same numbers for such a table); above it from the working set's blocks. At the benchmark's
# 3 ids and 10 numerics a million rows cost about 0.2 GiB in the in-memory trainer (inputs, tensors, the
# shuffled copy), about what the block-fed trainer's block, validation sample and network take.
IN_MEMORY_ROWS = 1_000_000
IN_MEMORY_ROWS_VARIABLE = "ENTIVEC_IN_MEMORY_ROWS"
BATCH_ROWS_VARIABLE = "ENTIVEC_BATCH_ROWS"
DASK_TIMEOUT_VARIABLE = "ENTIVEC_DASK_TIMEOUT"


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
    data_path: list[str] = field(default_factory=list)  # per stage: time and rows/s; the working set's size


@task(name="read-spec")
def read_spec(spec_path: str) -> tuple[Spec, str]:
    return load_spec(spec_path), Path(spec_path).read_text(encoding="utf-8")


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


def in_memory_rows() -> int:
    """Training rows up to which the network trains from arrays in memory (``fit_network``) rather than from the
    working set's blocks: ``ENTIVEC_IN_MEMORY_ROWS``, default IN_MEMORY_ROWS."""
    value = os.environ.get(IN_MEMORY_ROWS_VARIABLE, "").strip()
    try:
        return max(0, int(value.replace("_", ""))) if value else IN_MEMORY_ROWS
    except ValueError:
        raise ValueError(f"{IN_MEMORY_ROWS_VARIABLE} must be a whole number of rows, got {value!r}") from None


def batch_rows() -> int:
    """Rows per batch of the streamed data path: ``ENTIVEC_BATCH_ROWS``, default ``BATCH_ROWS`` (262,144). Memory
    grows with it (a batch in pandas, validated, encoded); the run's rows do not change it."""
    value = os.environ.get(BATCH_ROWS_VARIABLE, "").strip()
    try:
        rows = int(value.replace("_", "")) if value else BATCH_ROWS
    except ValueError:
        rows = 0
    if rows < 1:
        raise ValueError(f"{BATCH_ROWS_VARIABLE} must be a whole number of rows above 0, got {value!r}")
    return rows


@task(name="ids-and-fingerprint", retries=2, retry_delay_seconds=2, retry_condition_fn=retry_on_io_only,
      cache_policy=NO_CACHE)
def ids_and_fingerprint(spec: Spec, spec_path: str, folder: Path, groups: GroupTally) -> FirstPass:
    # The id partitions are checked on the Dask workers when the flow runs on Dask; the read stays here (the
    # fingerprint is one digest over the rows in order, and the review groups are tallied on the raw rows).
    return first_pass(spec, spec_path, folder, batch_rows(), observers=(groups,), mapper=_mapper())


@task(name="validate-and-clean", cache_policy=NO_CACHE)
def validate_and_clean_stream(spec: Spec, spec_path: str, folder: Path, first: FirstPass) -> StreamedTable:
    """The second pass; when every row is quarantined the quarantine is kept under the project folder first. On
    Dask, one file per worker task (``tasks/ingest/partitioned.py``), the same rows as the stream gives."""
    try:
        mapper = _mapper()
        if mapper is not in_process:
            return stream_clean_parts(spec, folder, first, mapper, batch_rows())
        return stream_clean(spec, spec_path, folder, batch_rows(), first=first)
    except InputError as error:
        kept = folder / QUARANTINE
        if error.ledger is None or error.ledger.rows_used or not kept.exists():
            raise
        path = keep_quarantine(kept, spec.name, project_home() / "quarantine")
        raise InputError(f"{error}; the quarantine ({quarantine_rows(kept)} row(s) with their reasons) is in {path}",
                         ledger=error.ledger) from error


@task(name="working-set", cache_policy=NO_CACHE)
def working_set_task(streamed: StreamedTable, spec: Spec, previous: dict | None):
    return build_working_set(streamed, spec, previous, batch_rows(), _mapper())


def _mapper() -> Mapper:
    """Where the per-partition work of the data path runs: the flow's Dask workers when it runs on Dask (they must
    reach the run's working folder: one machine or a shared file system), else this process."""
    client = flow_dask_client()
    if client is None:
        return in_process
    return dask_mapper(client, dask_timeout())


def dask_timeout() -> float | None:
    """Seconds one stage's Dask tasks may take before the run fails (``ENTIVEC_DASK_TIMEOUT``): unset, no limit."""
    value = os.environ.get(DASK_TIMEOUT_VARIABLE, "").strip()
    if not value:
        return None
    try:
        seconds = float(value)
    except ValueError:
        seconds = 0.0
    if not seconds > 0:
        raise ValueError(f"{DASK_TIMEOUT_VARIABLE} must be a number of seconds above 0, got {value!r}")
    return seconds


def _fit(ws: WorkingSet, spec: Spec, training, cardinalities: list[int], sizes: list[int], init_vectors,
         in_memory: bool, label: str):
    common = dict(columns=spec.embed_names, cardinalities=cardinalities, sizes=sizes, training=training,
                  task=spec.target.task, init_vectors=init_vectors)
    shown_as = "train" if label == "train-vectors" else "reseeded"  # the progress lines' name of each epoch
    if in_memory:
        inputs, y = ws.inputs("train")
        return train_vectors.with_options(task_run_name=label)(inputs, y, label=shown_as, **common)
    return fit_from_working_set_task.with_options(task_run_name=label)(ws, label=shown_as, **common)


fit_from_working_set_task = task(name="train-vectors-from-working-set", cache_policy=NO_CACHE)(fit_from_working_set)


def _predict_part(model, ws: WorkingSet, part: str, task_name: str, block_rows: int) -> np.ndarray:
    """The network's predictions for every row of ``part``, block by block (one block for a table that fits)."""
    out = [predict(model, inputs, task_name) for inputs, _ in ws.part_blocks(part, block_rows)]
    return np.concatenate(out) if out else np.zeros(0)


def _learnable(ws: WorkingSet, spec: Spec, files: list[str]) -> None:
    """The whole-table path's check that the target leaves something to learn and judge, on the working set."""
    train_values = targets.inverse(distinct_values(y for _, y in ws.part_blocks("train", BATCH_ROWS)),
                                   spec.target.transform)
    held = distinct_values(y for _, y in ws.part_blocks("test", BATCH_ROWS))
    targets.check_learnable_values(ws.rows["train"], ws.rows["test"], train_values, held, column=spec.target.column,
                                   task=spec.target.task, folds=spec.evaluation.folds, files=files)


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

    The data path is streamed whatever the table's size: batches of ``BATCH_ROWS`` rows are read, validated and
    cleaned into a working set on disk (``tasks/ingest/stream.py``), split, counted and encoded there
    (``tasks/train/workset.py``); the working set goes when the run ends, however it ends. Drift, profile,
    downstream evidence and the review groups read bounded seeded samples or tallies. The one choice made by
    size: up to ``in_memory_rows()`` training rows the network trains from the encoded arrays in memory (the
    whole-table trainer, so such a table gets the numbers it always got), above it from the working set's blocks.
    On Dask (``run_flow(train, ...)`` with ``--dask``), the id partitions, validation and cleaning (a task per file),
    counting and encoding (a task per range of rows) run on the workers with the same results
    (``tasks/ingest/partitioned.py``); training stays in this process.
    """
    if warm_start and not (incremental or vocabulary_from):
        raise ValueError("warm_start needs a version to start from: incremental=True (production) or vocabulary_from")
    spec, spec_text = read_spec(spec_path)
    check_store(spec.name)
    if source is not None:
        spec = drift.with_source(spec, source)
    with working_set("train") as folder:
        return _train_streamed(spec, spec_text, spec_path, folder, vocabulary_from=vocabulary_from,
                               source=source, incremental=incremental, warm_start=warm_start,
                               skip_unchanged=skip_unchanged)


def _train_streamed(spec: Spec, spec_text: str, spec_path: str, folder: Path, *, vocabulary_from: str | None,
                    source: str | None, incremental: bool, warm_start: bool, skip_unchanged: bool) -> TrainOutcome:
    """The train flow's body inside its working set ``folder`` (removed by the caller)."""
    shown = progress.begin("ingest: ids, fingerprint")
    groups = GroupTally(spec)
    first = ids_and_fingerprint(spec, spec_path, folder, groups)
    fingerprint = first.fingerprint
    shown.end(fingerprint["rows"], f"{len(first.source.paths)} file(s)")
    if skip_unchanged:
        same = outcomes.latest_same_input_task(spec.name, fingerprint["sha256"], spec.content_hash())
        if same is not None:
            return _no_new_data(spec, same, fingerprint)
    shown = progress.begin("validate and clean")
    streamed = validate_and_clean_stream(spec, spec_path, folder, first)
    ledger = streamed.ledger
    shown.end(ledger.rows_in, f"{ledger.rows_used:,} kept, {ledger.rows_quarantined:,} quarantined, "
                              f"{streamed.batches} batch(es)"
                              + (", one task per file on the Dask workers" if MERGE in streamed.seconds else ""))
    ev = spec.evaluation

    reference, drift_report, notes = None, None, []
    if incremental:
        reference = drift.load_reference_task(spec.name)
        if reference is None:
            notes.append(f"incremental: {spec.name} has no production version, so no drift check; trained from scratch")
            get_run_logger().warning(notes[-1])
        else:
            shown = progress.begin("drift check")
            # A seeded sample of the model-ready rows (evaluation.max_fold_rows): shares and bins, not counts.
            sample = cleaned_rows(streamed.cleaned, capped_rows(ledger.rows_used, ev.max_fold_rows, ev.seed))
            drift_report = drift.compare_task(reference, streamed.data_columns, sample, spec, fingerprint["sha256"],
                                              rows_in_drop=ledger.rows_used)
            shown.end(len(sample), "passed" if drift_report.passed else "thresholds broken: stopping")
            del sample
            drift.publish_in_prefect(drift_report)
            if not drift_report.passed:  # recorded, then stopped: production and the registry stay untouched
                stopped = outcomes.record_stop_task(spec, drift_report, fingerprint["sha256"])
                raise drift.DriftStop(drift_report, stopped)
            notes.append(f"incremental: drift against production version {reference.version} passed")
    shown = progress.begin("split and encode")
    start = earlier_version(spec.name, vocabulary_from) if vocabulary_from else reference
    previous = start.vector_set.vocabularies if start is not None else None
    ws, vocabularies, encoder = working_set_task(streamed, spec, previous)
    _learnable(ws, spec, streamed.files)
    cardinalities = [vocabularies[c].size for c in spec.embed_names]
    sizes = [col.resolved_size(vocabularies[col.name].size) for col in spec.columns.embed]
    init_vectors = None
    if warm_start and start is not None:  # ids line up: the vocabulary was extended from the same version
        init_vectors, sizes = drift.warm_start(spec, spec_path, start.vector_set, start.version, sizes)
        notes.append(f"warm start from the vectors of version {start.version}")
    elif warm_start:
        notes.append("no version to warm-start from: embedding tables start at random")
    on_disk = size_on_disk(folder)
    n_train, n_test = ws.rows["train"], ws.rows["test"]
    encode_seconds = shown.seconds
    shown.end(ledger.rows_used, f"{n_train:,} train, {n_test:,} held out; working set {on_disk / 2**20:,.1f} MiB")

    limit = in_memory_rows()
    in_memory = n_train <= limit
    trainer = (f"trained in memory ({n_train:,} training rows <= {limit:,}, {IN_MEMORY_ROWS_VARIABLE})" if in_memory
               else f"trained from the working set's blocks ({n_train:,} training rows > {limit:,}, "
                    f"{IN_MEMORY_ROWS_VARIABLE})")
    shown = progress.begin("train vectors")
    result = _fit(ws, spec, spec.training, cardinalities, sizes, init_vectors, in_memory, "train-vectors")
    shown.end(n_train * max(len(result.history), 1),
              f"{n_train:,} rows x {len(result.history)} epoch(s), best epoch {result.best_epoch}; {trainer}")
    stability = {}
    if ev.seed_check:  # the same rows and start, another seed: what a reseed alone changes
        shown = progress.begin("seed check")
        reseeded = _fit(ws, spec, spec.training.model_copy(update={"seed": spec.training.seed + RESEED,
                                                                   "progress": False}),
                        cardinalities, sizes, init_vectors, in_memory, "train-vectors-reseeded")
        stability = seed_stability(vocabularies, result.vectors, reseeded.vectors)
        shown.end(n_train * max(len(reseeded.history), 1), f"{len(reseeded.history)} epoch(s)")
        del reseeded
    y_test = np.concatenate([y for _, y in ws.part_blocks("test", max(limit, BATCH_ROWS))])
    network_pred = _predict_part(result.model, ws, "test", spec.target.task, max(limit, BATCH_ROWS))
    if spec.target.task == "regression":
        network_pred = targets.inverse(network_pred, spec.target.transform)
    network_metrics = task_metrics(spec.target.task, y_test, network_pred)

    # Bounded evidence: the fold networks train on a seeded sample of at most evaluation.max_fold_rows rows, the
    # downstream models on a seeded sample of that sample (max_train_rows) and are scored on a seeded sample of
    # the test rows (max_test_rows); only the downstream rows' out-of-fold vectors are kept. Rows come from the
    # working set by position, so nothing here grows with the table.
    fold_rows = capped_rows(n_train, ev.max_fold_rows, ev.seed)
    picked = capped_rows(len(fold_rows), ev.max_train_rows, ev.seed)
    rows = fold_rows[picked]
    tested = capped_rows(n_test, ev.max_test_rows, ev.seed)
    fold_inputs, fold_y = ws.take("train", fold_rows)
    # Folds are submitted from here, so a Dask task runner (flows.parallel) trains them in parallel.
    shown = progress.begin("cross-fit folds")
    spread = FoldSpread()
    oof = cross_fit_vectors(fold_inputs, fold_y, spec, cardinalities, sizes, result.vectors, spread=spread,
                            keep=picked)
    confidence = confidence_tables(spread, vocabularies, result.vectors)
    shown.end(len(fold_rows), f"{ev.folds} folds")
    in_sample = vectors_for_ids(fold_inputs.cat_ids[picked], result.vectors, spec.embed_names)
    on_test = vectors_for_ids(ws.take("test", tested)[0].cat_ids, result.vectors, spec.embed_names)
    del fold_inputs, fold_y
    shown = progress.begin("downstream evidence")
    evidence = evaluate_downstream(
        ws.frame("train", rows), ws.frame("test", tested), spec,
        vectors_oof=oof, vectors_in_sample=in_sample, vectors_test=on_test, network_test_pred=network_pred[tested],
        n_available=n_train, n_test_available=n_test,
    )
    shown.end(len(rows) + len(tested), ", ".join(ev.models))

    rates = [row["rows_per_second"] for row in result.history]
    data_path = [*streamed.summary()[:-1],
                 f"split and encode: {ledger.rows_used:,} rows in {encode_seconds:.1f} s "
                 f"({ledger.rows_used / max(encode_seconds, 1e-9):,.0f} rows/s)",
                 f"working set: {on_disk / 2**20:,.1f} MiB on disk (removed when the run ended)",
                 f"network: {trainer}; {float(np.median(rates)):,.0f} rows/s per epoch (median of {len(rates)})"]
    shown = progress.begin("record and register")
    project_home().mkdir(parents=True, exist_ok=True)
    workdir = Path(tempfile.mkdtemp(prefix="run-", dir=project_home()))
    try:
        # The drift profile: the fold sample of training rows (at most max_fold_rows) for bins and shares, the
        # vocabularies (every training row) for the embedded columns' counts.
        bundle = BundleInputs(
            spec, spec_text, fingerprint, ledger, streamed.quarantine, vocabularies, encoder,
            # The predicted-vs-actual plot: the downstream models' held-out sample (max_test_rows), not every
            # held-out row (a scatter of 20 M points would take more memory than the whole run).
            result, evidence, network_metrics, y_test[tested], network_pred[tested],
            profile=profile.data_profile_task(streamed.data_columns, ws.frame("train", fold_rows), spec,
                                              vocabularies),
            confidence=confidence, data_path=data_path,
        )
        vector_folder = write_bundle_task(bundle, workdir)
        plots.write_run_plots(bundle, workdir)
        review.write_groups(groups, spec, workdir)  # colours of the review page's map (spec review.groups)
        if drift_report is not None:  # the check it passed travels with the run
            drift.write_report(drift_report, workdir / drift.REPORT_FOLDER)
        # Every training id, batch by batch: lets a later gate judge only unseen rows.
        held_rows.write_train_ids(ws.frames("train", [spec.id_name]), spec, workdir / "data")
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
        metrics["working_set_bytes"] = float(on_disk)
        run_id = record_run_task(
            spec=spec, bundle=workdir, fingerprint=fingerprint, ledger=ledger.to_dict(),
            history=result.history, metrics=metrics, summary=(workdir / "summary.md").read_text(),
        )
        tags = {
            "entivec.data_fingerprint": fingerprint["sha256"],
            "entivec.spec_hash": spec.content_hash(),
            "entivec.rows_used": str(ledger.rows_used),
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
    shown.end(note=f"version {version}")
    shown = progress.begin("version report")
    warning = publish_report_or_warn(spec.name, version)
    if warning:
        notes.append(warning)
    shown.end(note=warning or None)

    return TrainOutcome(
        spec.name, version, run_id, ledger.rows_in, ledger.rows_used,
        ledger.rows_quarantined, evidence.vectors_help, (evidence.summary or ""),
        note="; ".join(notes), drift=drift_report.to_dict() if drift_report is not None else None,
        data_path=data_path,
    )
