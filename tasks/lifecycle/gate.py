"""
What is judged, and on which rows (the honest part):

- **Rows.** Candidate and production are judged on the SAME rows: the held-out split of the newest data,
  minus every row either version trained on. A version's training rows are known from the ids its train
  run recorded (``data/train_ids.parquet``); failing that, when the version was trained on exactly this data
  (same fingerprint) with the same split settings, its held-out rows ARE these rows. A random split of a
  grown table reshuffles rows, so without either proof an earlier version may have trained on "held-out"
  rows; ``promotion.require_unseen_rows`` (default true) then fails the gate rather than judge on leaked rows.
- **Downstream.** Each version's vectors are fixed features of the judge model (``promotion.judge_model``)
  beside the numeric and one-hot columns; the no-category baseline has only those. Where the judge model is
  fitted is ``promotion.downstream_fit`` (see ``PromotionSpec``); by default it is cross-fitted on the judged
  rows themselves, so no fitting row's target ever reached the vectors. Unknown categories get row 0, as when
  vectors are applied.
- **Paired bootstrap.** The per-row loss (squared error on the original target scale for regression, log
  loss for binary: ``per_row_loss``) of the reference minus that of the candidate is resampled with
  replacement, rows kept paired; the percentile interval of the resampled means is the confidence interval
  (Efron & Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 13; the same interval as
  ``scipy.stats.bootstrap(..., paired=True, method="percentile")``). With cross-fitted predictions the rows
  are not fully independent (each fold's model is shared by its rows); the interval treats them as if they
  were, the usual practice for paired comparisons of out-of-fold predictions (common practice, no source).
- **Context, not verdict:** the same judge model with one-hot and with target encoding of the embedded
  columns (``promotion.compare_encodings``), and each version's own network (its stored weights) on the
  judged rows. Their figures are reported beside the downstream ones; they do not decide.
- **Vector sanity**, **stability against production** and the team's **expectations** are checks on the
  vectors themselves (see ``checks`` and ``PromotionSpec``).
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from prefect import task
from prefect.cache_policies import NO_CACHE
from threadpoolctl import threadpool_limits

from entivec.schemas.promotion import PromotionSpec
from entivec.schemas.spec import Spec
from entivec.schemas.vector_set import VectorSet
from entivec.tasks.evidence.crossfit import fold_splitter
from entivec.tasks.evidence.downstream import (
    capped_rows,
    downstream_model,
    feature_sets,
    predict_downstream,
    target_values,
)
from entivec.tasks.evidence.metrics import PRIMARY, per_row_loss, task_metrics
from entivec.tasks.lifecycle import audit, registry
from entivec.tasks.lifecycle.checks import (
    Check,
    PairedInterval,
    expectation_checks,
    gain_check,
    json_value,
    paired_bootstrap,
    sanity_checks,
    stability_checks,
)
from entivec.tasks.lifecycle.compare import ColumnComparison
from entivec.tasks.lifecycle.registry import run_file
from entivec.tasks.lifecycle.rows import unseen_rows
from entivec.tasks.train import targets

BASELINE = "baseline"
ENCODINGS = ("onehot", "target_encoding")  # the embedded columns without vectors, for context
CANDIDATE = "candidate"
PRODUCTION = "production"
# Fits on fewer rows than this run the judge model on one OpenMP thread (see _threads_for).
_SMALL_FIT_ROWS = 20_000

# --- downstream -------------------------------------------------------------------------------------------------


@dataclass
class Downstream:
    """Predictions and per-row losses of the judge model with each feature set, on the judged rows."""

    y: np.ndarray
    predictions: dict[str, np.ndarray]
    losses: dict[str, np.ndarray]
    table: pd.DataFrame
    how: str


def vector_block(vector_set: VectorSet, frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    """The vectors of a frame's categories for the columns the vector set holds, side by side."""
    blocks = [vector_set.lookup(c, frame[c]) for c in columns if c in vector_set.vectors]
    return np.hstack(blocks) if blocks else np.zeros((len(frame), 0))


def judge_downstream(
    spec: Spec, fit_rows: pd.DataFrame, rows: pd.DataFrame, vector_sets: dict[str, VectorSet]
) -> Downstream:
    """Fit the judge model with the baseline features and with each version's vectors; predict ``rows``."""
    policy, task_kind = spec.promotion, spec.target.task
    transform = spec.target.transform if task_kind == "regression" else "none"
    y = target_values(rows, spec, "judged")
    labels = [BASELINE, *vector_sets, *(ENCODINGS if policy.compare_encodings else ())]
    predictions = {label: np.full(len(rows), np.nan) for label in labels}

    def fit_predict(train: pd.DataFrame, test: pd.DataFrame, into: np.ndarray | slice) -> None:
        y_train = target_values(train, spec, "fitting")
        y_fit = targets.forward(y_train, transform) if task_kind == "regression" else y_train
        blocks = {label: (vector_block(vs, train, spec.embed_names), vector_block(vs, test, spec.embed_names))
                  for label, vs in vector_sets.items()}
        sets = feature_sets(train, test, spec, y_fit, blocks)  # the same features the train run's evidence uses
        with _threads_for(len(train)):
            for label in labels:
                X_train, X_test = sets[label]
                model = downstream_model(policy.judge_model, task_kind, policy.seed)
                model.fit(X_train, y_fit)
                predictions[label][into] = predict_downstream(model, X_test, task_kind, transform)

    if policy.downstream_fit == "training_rows":
        keep = capped_rows(len(fit_rows), spec.evaluation.max_train_rows, spec.evaluation.seed)
        fit_predict(fit_rows.iloc[keep].reset_index(drop=True), rows, slice(None))
        how = (f"{policy.judge_model} fitted on {len(keep):,} rows of the newest training split, scored on "
               f"{len(rows):,} held-out rows")
    else:
        splitter = fold_splitter(task_kind, policy.folds, policy.seed)
        for train_idx, held_idx in splitter.split(np.zeros((len(rows), 1)), y):
            fit_predict(rows.iloc[train_idx].reset_index(drop=True), rows.iloc[held_idx].reset_index(drop=True),
                        held_idx)
        how = (f"{policy.judge_model} cross-fitted on the {len(rows):,} judged rows ({policy.folds} folds): each "
               "row is predicted by a model fitted on the other folds")
    losses = {label: per_row_loss(task_kind, y, p) for label, p in predictions.items()}
    table = pd.DataFrame([
        {"features": label, "model": policy.judge_model, **task_metrics(task_kind, y, predictions[label]),
         "mean_loss": float(losses[label].mean()), "rows": len(rows)}
        for label in labels
    ])
    return Downstream(y, predictions, losses, table, how)


@contextlib.contextmanager
def _threads_for(rows: int) -> Iterator[None]:
    """One OpenMP thread for small fits: below some tens of thousands of rows the threads' start-up and
    synchronisation cost more than they save, badly so on a busy machine (common practice, no source)."""
    if rows >= _SMALL_FIT_ROWS:
        yield
        return
    with threadpool_limits(limits=1, user_api="openmp"):
        yield


def network_predictions(version: registry.LoadedVersion, rows: pd.DataFrame) -> np.ndarray | None:
    """The version's own network on ``rows`` (original target scale), or None when its weights are not stored."""
    try:
        from entivec.tasks.train.encoder import FeatureEncoder
        from entivec.tasks.train.network import load_weights, predict
    except ImportError:
        return None
    encoder_file = run_file(version.run_id, "network/encoder.json")
    weights_file = run_file(version.run_id, "network/weights.safetensors")
    if encoder_file is None or weights_file is None:
        return None
    encoder = FeatureEncoder.from_dict(json.loads(encoder_file.read_text(encoding="utf-8")),
                                       version.vector_set.vocabularies)
    target = version.vector_set.metadata.get("target") or {}
    task_kind = target.get("task", "regression")
    pred = predict(load_weights(weights_file), encoder.transform(rows), task_kind)
    if task_kind == "regression":
        pred = targets.inverse(pred, target.get("transform", "none"))
    return np.asarray(pred, dtype=np.float64).reshape(-1)


# --- the verdict ------------------------------------------------------------------------------------------------


@dataclass
class GateResult:
    name: str
    candidate_version: str
    production_version: str | None
    passed: bool
    checks: list[Check]
    intervals: dict[str, PairedInterval]
    downstream: pd.DataFrame
    comparisons: dict[str, ColumnComparison]
    production_expectations: list[Check]
    rows: int
    rows_note: str
    how: str
    primary_metric: str
    data_fingerprint: str
    policy: dict[str, Any]
    data_source: str = ""  # the spec's source (file or glob) the judged rows came from

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.passed is False]

    def failed_lines(self) -> list[str]:
        return [f"{c.name}: {c.message}" for c in self.failed]

    def headline(self) -> dict[str, str]:
        """The few figures an audit entry carries."""
        out = {"rows": str(self.rows), "judged_data": self.data_fingerprint[:12]}
        for key, interval in self.intervals.items():
            out[f"gain_vs_{key}"] = interval.gain_text()
        drifts = [f"{col} {comp.drift:.2f}" for col, comp in self.comparisons.items() if np.isfinite(comp.drift)]
        if drifts:
            out["drift"] = ", ".join(drifts)
        out["checks"] = f"{sum(c.passed is True for c in self.checks)} passed, {len(self.failed)} failed"
        return out

    def checks_frame(self) -> pd.DataFrame:
        return pd.DataFrame([{"group": c.group, "check": c.name, "verdict": _verdict_word(c.passed),
                              "figures": c.message} for c in self.checks])

    def to_dict(self) -> dict[str, Any]:
        return json_value({
            "name": self.name, "candidate_version": self.candidate_version,
            "production_version": self.production_version, "passed": self.passed,
            "rows": self.rows, "rows_note": self.rows_note, "how": self.how, "primary_metric": self.primary_metric,
            "data_fingerprint": self.data_fingerprint, "policy": self.policy,
            "checks": [c.to_dict() for c in self.checks],
            "intervals": {k: v.to_dict() for k, v in self.intervals.items()},
            "downstream": self.downstream.to_dict("records"),
            "comparisons": {k: v.summary(top=int(self.policy.get("top_movers", 10)))
                            for k, v in self.comparisons.items()},
            "production_expectations": [c.to_dict() for c in self.production_expectations],
        })

    def summary(self) -> str:
        against = f"production (version {self.production_version})" if self.production_version else "no production"
        lines = [
            f"Gate for {self.name} version {self.candidate_version} against {against} and the no-category baseline: "
            f"{'PASSED' if self.passed else 'FAILED'}.",
            f"Rows: {self.rows_note}",
            f"Judge: {self.how}.",
        ]
        lines += [f"- [{_verdict_word(c.passed)}] {c.name}: {c.message}" for c in self.checks]
        return "\n".join(lines)


def _verdict_word(passed: bool | None) -> str:
    return {True: "pass", False: "FAIL", None: "info"}[passed]


def run_gate(
    *,
    spec: Spec,
    candidate: registry.LoadedVersion,
    production: registry.LoadedVersion | None,
    train_rows: pd.DataFrame,
    test_rows: pd.DataFrame,
    data_fingerprint: str,
) -> GateResult:
    """Judge ``candidate`` against the baseline and ``production`` (when there is one) by ``spec.promotion``."""
    policy = spec.promotion
    versions = {CANDIDATE: candidate, **({PRODUCTION: production} if production else {})}
    judged = unseen_rows(test_rows, spec, versions, data_fingerprint)
    checks = list(judged.checks)
    intervals: dict[str, PairedInterval] = {}
    table = pd.DataFrame()
    how = "not judged"
    enough = judged.checks[-1].passed
    if enough:
        downstream = judge_downstream(spec, train_rows, judged.frame, {k: v.vector_set for k, v in versions.items()})
        table, how = downstream.table, downstream.how
        comparisons_to_make = [(BASELINE, policy.min_gain_over_baseline, "the no-category baseline")]
        if production:
            comparisons_to_make.append((PRODUCTION, policy.min_gain_over_production, f"production (version "
                                                                                      f"{production.version})"))
        for key, margin, label in comparisons_to_make:
            interval = paired_bootstrap(
                downstream.losses[key], downstream.losses[CANDIDATE], confidence=policy.confidence,
                resamples=policy.bootstrap_resamples, seed=policy.seed, reference=key, candidate=CANDIDATE,
            )
            intervals[key] = interval
            checks.append(gain_check(interval, margin, label))
        checks += _encoding_checks(downstream, policy)
        checks += _network_checks(spec, versions, judged.frame, downstream.y, policy)
    else:
        checks.append(Check("downstream", "downstream evidence", False,
                            "too few judged rows to measure the downstream gain"))
    checks += sanity_checks(candidate.vector_set, spec.embed_names, policy)
    comparisons: dict[str, ColumnComparison] = {}
    if production:
        stability, comparisons = stability_checks(production.vector_set, candidate.vector_set, spec.embed_names,
                                                  policy)
        checks += stability
    checks += expectation_checks(candidate.vector_set, policy)
    for_production = expectation_checks(production.vector_set, policy) if production else []
    passed = not any(c.passed is False for c in checks)
    return GateResult(
        name=candidate.name, candidate_version=str(candidate.version),
        production_version=str(production.version) if production else None, passed=passed, checks=checks,
        intervals=intervals, downstream=table, comparisons=comparisons, production_expectations=for_production,
        rows=len(judged.frame), rows_note=f"{len(judged.frame):,} of {judged.held_out:,} held-out rows of the newest "
        f"data; " + "; ".join(judged.notes.values()),
        how=how, primary_metric=PRIMARY[spec.target.task], data_fingerprint=data_fingerprint,
        policy=policy.model_dump(mode="json"), data_source=str(spec.source.path),
    )


def _encoding_checks(downstream: Downstream, policy: PromotionSpec) -> list[Check]:
    """The candidate against one-hot and target encoding of the same columns: context, not a verdict."""
    out = []
    for name in ENCODINGS:
        if name not in downstream.losses:
            continue
        interval = paired_bootstrap(downstream.losses[name], downstream.losses[CANDIDATE],
                                    confidence=policy.confidence, resamples=policy.bootstrap_resamples,
                                    seed=policy.seed)
        out.append(Check("context", f"candidate vs {name.replace('_', ' ')}", None,
                         f"loss reduction {interval.gain_text()} against the embedded columns as {name} "
                         "(same judge model and rows; reported, not judged)",
                         {"gain": interval.relative(interval.difference), "low": interval.relative(interval.low),
                          "high": interval.relative(interval.high)}))
    return out


def _network_checks(
    spec: Spec, versions: dict, rows: pd.DataFrame, y: np.ndarray, policy: PromotionSpec
) -> list[Check]:
    """Each version's own network on the judged rows: figures for context, never deciding."""
    preds = {}
    for label, version in versions.items():
        try:
            pred = network_predictions(version, rows)
        except registry.RegistryUnavailable:
            raise  # a store that cannot be read is not a network that cannot be loaded
        except Exception as exc:  # noqa: BLE001 - context only: a network that cannot be loaded is reported
            return [Check("network", "networks on the judged rows", None, f"could not be evaluated: {exc}")]
        if pred is None:
            return [Check("network", "networks on the judged rows", None,
                          f"version {version.version} has no stored network; not evaluated")]
        preds[label] = pred
    task_kind = spec.target.task
    figures = {label: task_metrics(task_kind, y, p)[PRIMARY[task_kind]] for label, p in preds.items()}
    message = ", ".join(f"{label} network {PRIMARY[task_kind]} {v:.6g}" for label, v in figures.items())
    if PRODUCTION in preds:
        interval = paired_bootstrap(per_row_loss(task_kind, y, preds[PRODUCTION]),
                                    per_row_loss(task_kind, y, preds[CANDIDATE]), confidence=policy.confidence,
                                    resamples=policy.bootstrap_resamples, seed=policy.seed)
        message += f"; candidate vs production gain {interval.gain_text()}"
    return [Check("network", "networks on the judged rows", None, message, figures)]


# --- applying the verdict ---------------------------------------------------------------------------------------


def apply_verdict(
    result: GateResult, *, by: str, reason: str, forced: bool, evidence_run: str, candidate_fingerprint: str
) -> audit.AuditEntry:
    """Move production (a pass, or a forced failure) or record the refusal, under the model's lifecycle lock.

    The move is made only if production is still the version the gate judged against (compare-and-check):
    a promotion applied meanwhile by someone else raises ``audit.ConcurrentChange`` and changes nothing.
    """
    details = {
        "figures": result.headline(),
        "failed_checks": [c.name for c in result.failed],
        "evidence_run": evidence_run,
        "gate_data_fingerprint": result.data_fingerprint,
    }
    verdict = "pass" if result.passed else ("forced" if forced else "fail")
    with audit.locked(result.name) as session:
        if result.passed or forced:
            entry = session.move(
                registry.PRODUCTION, result.candidate_version, event="forced_promote" if forced else "promote",
                by=by, reason=reason, verdict=verdict, data_fingerprint=candidate_fingerprint, details=details,
                expected_from=result.production_version,
            )
        else:
            entry = session.record(
                event="refused", alias=registry.PRODUCTION, from_version=result.production_version,
                to_version=result.candidate_version, by=by, reason=reason, verdict=verdict,
                data_fingerprint=candidate_fingerprint, details=details,
            )
    c = registry.client()
    for key, value in (("verdict", verdict), ("evidence_run", evidence_run), ("at", entry.at)):
        c.set_model_version_tag(result.name, result.candidate_version, f"{registry.TAG_PREFIX}gate.{key}", value)
    return entry


@task(name="apply-verdict", cache_policy=NO_CACHE)
def apply_verdict_task(result: GateResult, **kwargs) -> audit.AuditEntry:
    return apply_verdict(result, **kwargs)


@task(name="judge-candidate", cache_policy=NO_CACHE)
def run_gate_task(**kwargs) -> GateResult:
    return run_gate(**kwargs)
