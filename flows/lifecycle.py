"""The lifecycle verbs: promote a version to `production` through the gate, roll back, report, compare.

Every alias move goes through the audit history (``tasks/lifecycle/audit.py``): intent first, then the move, then its
settlement, under the model's lifecycle lock, so the aliases and the history never disagree.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd
from prefect import flow, get_run_logger, task
from prefect.cache_policies import NO_CACHE
from prefect.states import Failed

from entivec import progress
from entivec.schemas.spec import Spec
from entivec.tasks.ingest.clean import clean
from entivec.tasks.ingest.fingerprint import data_fingerprint
from entivec.tasks.ingest.read import ingest
from entivec.tasks.ingest.split import split
from entivec.tasks.lifecycle import audit, gate, registry, track
from entivec.tasks.lifecycle.registry import LifecycleError
from entivec.tasks.lifecycle.rows import spec_for
from entivec.tasks.lifecycle.track import now_iso, operator
from entivec.tasks.lifecycle.versiondiff import VersionDiff, diff_versions  # noqa: F401
from entivec.tasks.present import report, review
from entivec.tasks.present.report import write_diff_html  # noqa: F401


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


# --- comparing two versions: a read, no flow run (tasks/lifecycle/versiondiff.py) ---------------------------------
