"""The lifecycle verbs: promote a version to `production` through the gate, roll back, report, compare.

Every alias move goes through the audit history (``tasks/lifecycle/audit.py``): intent first, then the move, then its
settlement, under the model's lifecycle lock, so the aliases and the history never disagree.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from prefect import flow, get_run_logger, task
from prefect.cache_policies import NO_CACHE
from prefect.states import Failed

from entivec import progress
from entivec.schemas.spec import Spec
from entivec.tasks.ingest.clean import clean, validate_and_clean
from entivec.tasks.ingest.fingerprint import data_fingerprint
from entivec.tasks.ingest.read import ingest, read_source
from entivec.tasks.ingest.split import split, split_rows
from entivec.tasks.lifecycle import audit, checks, gate, registry, track
from entivec.tasks.lifecycle.compare import ColumnComparison, columns_of, compare_vector_sets, comparison_table
from entivec.tasks.lifecycle.rows import spec_for, unseen_rows
from entivec.tasks.lifecycle.track import now_iso, operator
from entivec.tasks.present import report, review


class LifecycleError(registry.RegistryError):
    """A lifecycle request that cannot be carried out as asked (no earlier production, blank reason, ...)."""


@dataclass
class PromotionOutcome:
    name: str
    candidate: str
    previous_production: str | None
    promoted: bool
    forced: bool
    verdict: str  # pass | fail | forced
    evidence_run: str
    report_path: str
    summary: str
    checks: pd.DataFrame
    failed: list[str] = field(default_factory=list)
    history_seq: int | None = None


class GateRefused(Exception):
    """The gate refused the candidate; ``outcome`` holds the verdict, the failed checks and their figures."""

    def __init__(self, outcome: PromotionOutcome) -> None:
        failed = "\n".join(f"  - {line}" for line in outcome.failed)
        super().__init__(
            f"the gate refused {outcome.name} version {outcome.candidate}; production stays at "
            f"{'version ' + outcome.previous_production if outcome.previous_production else 'no version'}.\n"
            f"Failed checks:\n{failed}"
        )
        self.outcome = outcome


@dataclass
class RollbackOutcome:
    name: str
    restored: str
    replaced: str
    history_seq: int


def _reason(reason: str | None) -> str:
    text = (reason or "").strip()
    if not text:
        raise LifecycleError("a reason is required (--reason \"...\"): it is kept in the history")
    return text


# --- tasks ------------------------------------------------------------------------------------------------------


@task(name="repair-history")
def repair_history(name: str) -> int:
    with audit.locked(name, repair=False) as session:
        return len(session.repair())


@task(name="load-versions", cache_policy=NO_CACHE)
def load_versions(
    name: str, candidate_ref: str
) -> tuple[registry.LoadedVersion, registry.LoadedVersion | None]:
    candidate = registry.load_version(name, candidate_ref)
    current = registry.aliases_of(name).get(registry.PRODUCTION)
    if current == str(candidate.version):
        raise LifecycleError(f"{name} version {candidate.version} is production already; nothing to promote")
    production = registry.load_version(name, current) if current else None
    return candidate, production


@task(name="read-gate-spec", cache_policy=NO_CACHE)
def read_gate_spec(
    name: str, candidate: registry.LoadedVersion, spec_path: str | None, source: str | None = None
) -> tuple[Spec, str]:
    return spec_for(name, candidate, spec_path, source)


@task(name="record-gate-evidence", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=2)
def record_evidence(result: gate.GateResult, by: str, reason: str, forced: bool, spec_path: str) -> str:
    return report.record_gate_evidence(result, by=by, reason=reason, forced=forced, spec_path=spec_path)


# --- flows ------------------------------------------------------------------------------------------------------


@flow(name="promote", flow_run_name="promote {name}", validate_parameters=False)
def promote(
    name: str,
    reason: str,
    version: str | None = None,
    spec_path: str | None = None,
    by: str | None = None,
    force: bool = False,
    source: str | None = None,
) -> PromotionOutcome:
    """Judge a candidate (default: the `staging` version) by the spec's gate and make it `production` if it passes.

    The newest data is read with ``spec_path`` (default: the spec file the candidate was trained from), from
    ``source`` when given (default: the drop the candidate's train run read with ``--source``, if any). A
    failed gate leaves production untouched, is recorded in the history, and ends this flow run Failed
    (its message lists the failed checks); calling the flow then raises :class:`GateRefused`, whose
    ``outcome`` holds the figures. ``force`` promotes despite a failed gate and records that it was forced.
    """
    reason = _reason(reason)
    who = by or operator()
    repair_history(name)
    candidate, production = load_versions(name, version or registry.STAGING)
    spec, spec_file = read_gate_spec(name, candidate, spec_path, source)
    shown = progress.begin("read and clean")
    raw, files = ingest(spec, spec_file)
    fingerprint = data_fingerprint(raw, files)["sha256"]
    cleaned = clean(raw, spec, files)
    train_rows, test_rows = split(cleaned.frame, spec.split, spec.id_name)
    shown.end(len(raw), f"{len(test_rows):,} held out")
    shown = progress.begin("gate")
    result = gate.run_gate_task(
        spec=spec, candidate=candidate, production=production, train_rows=train_rows, test_rows=test_rows,
        data_fingerprint=fingerprint,
    )
    shown.end(len(test_rows), "passed" if result.passed else "failed")
    forced = force and not result.passed
    evidence_run = record_evidence(result, who, reason, forced, spec_file)
    candidate_fingerprint = registry.client().get_model_version(name, candidate.version).tags.get(
        f"{registry.TAG_PREFIX}data_fingerprint", "")
    entry = gate.apply_verdict_task(
        result, by=who, reason=reason, forced=forced, evidence_run=evidence_run,
        candidate_fingerprint=candidate_fingerprint,
    )
    try:
        published = report.publish_version_report_task(name, result.candidate_version)
        report_path, link = str(published.path), published.artifact_uri
    except Exception as exc:  # noqa: BLE001 - the verdict stands and is recorded; the report can be redone
        get_run_logger().warning("version report not written (%s); run `entivec report %s %s`", exc, name,
                                 result.candidate_version)
        report_path, link = "(not written)", ""
    try:  # the review page again, now with this gate's figures
        review.publish_review_page_task(name, result.candidate_version)
    except Exception as exc:  # noqa: BLE001 - as above: the verdict stands; `entivec review` redoes the page
        get_run_logger().warning("review page not written (%s); run `entivec review %s %s`", exc, name,
                                 result.candidate_version)
    track.markdown_in_prefect(
        f"{name}-gate-v{candidate.version}", _gate_markdown(result, forced, who, reason, link),
        f"promotion gate of {name} version {candidate.version}",
    )
    outcome = PromotionOutcome(
        name=name, candidate=result.candidate_version, previous_production=result.production_version,
        promoted=result.passed or forced, forced=forced, verdict=entry.verdict, evidence_run=evidence_run,
        report_path=report_path, summary=result.summary(), checks=result.checks_frame(),
        failed=result.failed_lines(), history_seq=entry.seq,
    )
    if not outcome.promoted:
        return Failed(message=f"gate refused: {'; '.join(c.name for c in result.failed)}", data=GateRefused(outcome))
    return outcome


def _gate_markdown(result: gate.GateResult, forced: bool, by: str, reason: str, link: str) -> str:
    verdict = "PASSED" if result.passed else ("FAILED, promoted by force" if forced else "FAILED")
    lines = [f"# {result.name} version {result.candidate_version}: gate {verdict}", "",
             f"By {by} at {now_iso()}: {reason}", "", f"Rows: {result.rows_note}", "",
             "| group | check | verdict | figures |", "|---|---|---|---|"]
    for c in result.checks:
        word = {True: "pass", False: "**FAIL**", None: "info"}[c.passed]
        lines.append(f"| {c.group} | {c.name} | {word} | {c.message.replace('|', '/')} |")
    lines += ["", f"[Version report]({link})" if link else "Version report: not written."]
    return "\n".join(lines)


@flow(name="rollback", flow_run_name="rollback {name}", validate_parameters=False)
def rollback(name: str, reason: str, by: str | None = None) -> RollbackOutcome:
    """Point `production` back to the version it held before the current one, in one recorded step."""
    reason = _reason(reason)
    return rollback_production(name, reason, by or operator())


@task(name="rollback-production", cache_policy=NO_CACHE)
def rollback_production(name: str, reason: str, by: str) -> RollbackOutcome:
    with audit.locked(name) as session:
        current = session.aliases().get(registry.PRODUCTION)
        if current is None:
            raise LifecycleError(f"{name} has no production version; nothing to roll back")
        chain = audit.holders(session.entries())
        if len(chain) < 2:
            raise LifecycleError(
                f"{name}: production (version {current}) has no earlier version in the history to go back to"
            )
        target = chain[-2]
        registry.resolve(name, target)  # a deleted version gets the registry's own message
        fingerprint = registry.client().get_model_version(name, target).tags.get(
            f"{registry.TAG_PREFIX}data_fingerprint", "")
        entry = session.move(
            registry.PRODUCTION, target, event="rollback", by=by, reason=reason, data_fingerprint=fingerprint,
            details={"figures": {"replaced": f"version {current}"}}, expected_from=current,
        )
    track.markdown_in_prefect(
        f"{name}-rollback", f"# {name}: production rolled back from version {current} to version {target}\n\n"
        f"By {by} at {entry.at}: {reason}", f"rollback of {name}",
    )
    return RollbackOutcome(name, target, current, entry.seq)


@flow(name="version-report", flow_run_name="report {name} version {version}", validate_parameters=False)
def version_report(name: str, version: str, out: str | None = None) -> report.PublishedReport:
    """Write a version's HTML report, log it to its train run and link it here."""
    return report.publish_version_report_task(name, version, out)


# --- comparing two versions (a read: no flow run needed) --------------------------------------------------------


@dataclass
class VersionDiff:
    name: str
    older: str
    newer: str
    comparisons: dict[str, ColumnComparison]
    summary: pd.DataFrame
    metrics: pd.DataFrame
    judged: pd.DataFrame | None
    notes: list[str]

    def html(self) -> str:
        return report.diff_html(self.name, self.older, self.newer, self.comparisons, self.summary, self.metrics,
                                self.judged, self.notes)


def _run_metrics(run_id: str) -> dict[str, float]:
    metrics = registry.client().get_run(run_id).data.metrics
    return {k: v for k, v in metrics.items() if not k.startswith("epoch_")}


def diff_versions(name: str, a: str, b: str, *, spec_path: str | None = None, neighbours: int = 10) -> VersionDiff:
    """Compare version (or alias) ``a`` with ``b``: vocabulary, aligned drift, neighbours, downstream metrics.

    With ``spec_path`` both are also judged on the same held-out rows of that spec's data (as the gate does).
    """
    older, newer = registry.load_version(name, a), registry.load_version(name, b)
    comparisons = compare_vector_sets(older.vector_set, newer.vector_set, neighbours=neighbours)
    cols = columns_of(older.vector_set, newer.vector_set)
    notes = []
    if cols["older_only"] or cols["newer_only"]:
        notes.append(f"columns only in version {older.version}: {', '.join(cols['older_only']) or 'none'}; "
                     f"only in version {newer.version}: {', '.join(cols['newer_only']) or 'none'}")
    ma, mb = _run_metrics(older.run_id), _run_metrics(newer.run_id)
    keys = sorted(set(ma) | set(mb))
    metrics = pd.DataFrame({"metric": keys, f"v{older.version}": [ma.get(k, float("nan")) for k in keys],
                            f"v{newer.version}": [mb.get(k, float("nan")) for k in keys]})
    notes.append("The train-run metrics were each measured on that version's own held-out rows"
                 + ("; the judged table puts both on the same rows." if spec_path else
                    "; pass --spec to judge both on the same rows."))
    judged = None
    if spec_path:
        judged, note = _judge_pair(name, older, newer, spec_path)
        notes.append(note)
    return VersionDiff(name, str(older.version), str(newer.version), comparisons, comparison_table(comparisons),
                       metrics, judged, notes)


def _judge_pair(
    name: str, older: registry.LoadedVersion, newer: registry.LoadedVersion, spec_path: str
) -> tuple[pd.DataFrame, str]:
    spec, spec_file = spec_for(name, newer, spec_path)
    raw, files = read_source(spec, spec_file)
    cleaned = validate_and_clean(raw, spec, files)
    train_rows, test_rows = split_rows(cleaned.frame, spec.split, spec.id_name)
    labels = {f"v{older.version}": older, f"v{newer.version}": newer}
    rows = unseen_rows(test_rows, spec, labels, data_fingerprint(raw, files)["sha256"])
    if len(rows.frame) < 2:
        raise LifecycleError(f"no held-out rows of {spec_file} are unseen by both versions; cannot judge them")
    downstream = gate.judge_downstream(spec, train_rows, rows.frame, {k: v.vector_set for k, v in labels.items()})
    interval = checks.paired_bootstrap(
        downstream.losses[f"v{older.version}"], downstream.losses[f"v{newer.version}"],
        confidence=spec.promotion.confidence, resamples=spec.promotion.bootstrap_resamples, seed=spec.promotion.seed,
    )
    note = (f"Judged on {len(rows.frame):,} held-out rows ({downstream.how}); per-row "
            f"{checks.loss_name(spec.target.task)}: version {newer.version} vs {older.version} loss reduction "
            f"{interval.gain_text()} ({100 * interval.confidence:.0f}% paired bootstrap). "
            + "; ".join(rows.notes.values()) + ".")
    return downstream.table, note


def write_diff_html(diff: VersionDiff, out: str | Path) -> Path:
    from entivec.tasks.apply.outputs import write_text_atomically

    return write_text_atomically(out, diff.html(), "the diff report")
