"""Readable HTML: a version's report, the gate's evidence and the comparison of two versions, each one file.

Every plot is embedded as a base64 PNG and the styling is inline, so a report opens in any browser without
Python, a server or a network. Reports are logged to MLflow as run artifacts (the version's train run holds
``report/version_report.html``; each gate's evidence run holds ``gate/gate_report.html``) and, inside a
Prefect run, linked as Prefect artifacts.
"""

from __future__ import annotations

import io
import json
import re
import sys
import tempfile
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING
from urllib.parse import urlsplit, urlunsplit

import matplotlib

matplotlib.use("Agg")  # files only, never a window

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from entivec.lazytasks import tasks_on_first_use  # noqa: E402
from entivec.schemas.vector_set import column_file_stem  # noqa: E402
from entivec.settings import project_home, tracking_uri  # noqa: E402
from entivec.tasks.apply.outputs import write_text_atomically  # noqa: E402
from entivec.tasks.lifecycle import audit, registry  # noqa: E402
from entivec.tasks.lifecycle.checks import PairedInterval, loss_name
from entivec.tasks.lifecycle.compare import ColumnComparison  # noqa: E402
from entivec.tasks.lifecycle.registry import run_file  # noqa: E402
from entivec.tasks.lifecycle.stamps import now_iso, operator  # noqa: E402

if TYPE_CHECKING:
    from entivec.tasks.lifecycle.gate import GateResult
    from entivec.tasks.lifecycle.versiondiff import VersionDiff

from entivec.tasks.present.html import esc, facts, image, markdown, page, png_bytes, table  # noqa: E402
from entivec.tasks.present.maps import (  # noqa: E402
    RARE_ROWS,
    axis_label,
    principal_axes,
    split_movers,
    version_map,
)

GATE_FOLDER = "gate"
_METRIC_UNSAFE = re.compile(r"[^A-Za-z0-9_.\- /]")  # characters MLflow refuses in a metric name
REPORT_FOLDER = "report"
VERSION_REPORT = "version_report.html"
GATE_REPORT = "gate_report.html"
# --- plots ------------------------------------------------------------------------------------------------------


def aligned_map(comp: ColumnComparison, older: str, newer: str, label_top: int = 12) -> bytes:
    """Both versions' shared categories on the older version's first two principal axes, newer aligned onto it."""
    mean, axes, explained = principal_axes(comp.older_shared)
    a = (comp.older_shared - mean) @ axes
    b = (comp.aligned_newer - mean) @ axes
    fig, ax = plt.subplots(figsize=(6.5, 5.5))
    for i in range(len(a)):  # one segment per category: the move, in the older version's plane
        ax.plot([a[i, 0], b[i, 0]], [a[i, 1], b[i, 1]], color="#9aa4ae", linewidth=0.7, zorder=1)
    ax.scatter(a[:, 0], a[:, 1], s=22, label=older, zorder=2)
    ax.scatter(b[:, 0], b[:, 1], s=22, marker="^", label=f"{newer} (aligned)", zorder=3)
    top = set(split_movers(comp.movers)[0]["category"].head(label_top))
    for i, cat in enumerate(comp.shared):
        if cat in top or len(comp.shared) <= label_top:
            ax.annotate(cat, a[i], fontsize=7, color="#1f4e79")
            ax.annotate(cat, b[i], fontsize=6, color="#9a4a00", alpha=0.8)
    ax.set(title=f"'{comp.column}': {older} and {newer} after Procrustes alignment",
           xlabel=axis_label(1, explained[0], older), ylabel=axis_label(2, explained[1], older))
    ax.legend(fontsize=8)
    return png_bytes(fig)


def drift_bars(comp: ColumnComparison, top: int = 30) -> bytes:
    """The largest drifts of categories with at least RARE_ROWS training rows in both versions."""
    movers = split_movers(comp.movers)[0].dropna(subset=["drift"]).head(top).iloc[::-1]
    fig, ax = plt.subplots(figsize=(6.5, max(2.0, 0.22 * len(movers) + 1.0)))
    if "moved" in movers.columns:  # the noise-aware comparison: movement beyond a category's own noise stands out
        beyond = (movers["moved"] == "beyond noise").to_numpy()
        ax.barh(movers["category"].astype(str), movers["drift"], color=np.where(beyond, "#1f4e79", "#a9c4dd"))
        ax.barh([], [], color="#1f4e79", label="beyond its own noise")
        ax.barh([], [], color="#a9c4dd", label="within its own noise or not measured")
    else:
        ax.barh(movers["category"].astype(str), movers["drift"], label="drift of a category")
    ax.axvline(comp.drift, color="black", linestyle=":", label=f"column drift {comp.drift:.3f}")
    ax.set(title=f"'{comp.column}': largest drifts ({len(movers)}, each seen in {RARE_ROWS}+ rows in both)",
           xlabel="aligned distance / older spread")
    ax.legend(fontsize=8)
    return png_bytes(fig)


def bootstrap_plot(interval: PairedInterval, margin: float, title: str) -> bytes:
    rel = interval.distribution / interval.reference_loss if interval.reference_loss > 0 else interval.distribution
    fig, ax = plt.subplots(figsize=(6, 3.2))
    ax.hist(rel * 100, bins=60, color="#8fb8de")
    for value, style, label in (
        (interval.relative(interval.low), "--", f"{100 * interval.confidence:.0f}% interval"),
        (interval.relative(interval.high), "--", None),
        (margin, "-", f"required lower end ({margin:+.1%})"),
    ):
        ax.axvline(value * 100, color="black" if style == "--" else "#cf222e", linestyle=style, label=label)
    ax.set(title=title, xlabel="loss reduction, % of the reference's mean loss", ylabel="resamples")
    ax.legend(fontsize=8)
    return png_bytes(fig)


def movers_sections(column: str, comp: ColumnComparison, top: int) -> list[str]:
    """Top movers among categories seen often enough in both versions; the rare ones listed apart."""
    common, rare = split_movers(comp.movers)
    parts = [f"<h3>Top movers of '{esc(column)}' (categories with {RARE_ROWS}+ training rows in both versions)</h3>",
             table(common.drop(columns=["rare"], errors="ignore").head(top))]
    if "moved" in comp.movers.columns:
        parts.append('<p class="muted">Movement is "beyond noise" when a category\'s drift exceeds what its own '
                     "uncertainty (the spread of its cross-fitted vectors) explains.</p>")
    if len(rare):
        parts.append(f'<p class="muted">{len(rare)} rare categories (fewer than {RARE_ROWS} training rows in either '
                     "version) are listed apart: their movement is mostly noise.</p>")
        parts.append(table(rare.drop(columns=["rare"], errors="ignore").head(top)))
    return parts


# --- the gate's evidence ----------------------------------------------------------------------------------------


def _plot_name(kind: str, column: str) -> str:
    return f"{kind}_{column_file_stem(column)}.png"


def gate_plots(result: GateResult) -> dict[str, bytes]:
    margins = {"baseline": result.policy["min_gain_over_baseline"],
               "production": result.policy["min_gain_over_production"]}
    out = {}
    for key, interval in result.intervals.items():
        out[f"bootstrap_vs_{key}.png"] = bootstrap_plot(interval, margins[key], f"Paired bootstrap: candidate vs {key}")
    older = f"v{result.production_version}"
    newer = f"v{result.candidate_version}"
    for col, comp in result.comparisons.items():
        if len(comp.shared) >= 2:
            out[_plot_name("aligned", col)] = aligned_map(comp, older, newer)
            out[_plot_name("drift", col)] = drift_bars(comp)
    return out


def gate_sections(result: GateResult, plots: dict[str, bytes], *, heading: str = "Promotion gate") -> list[str]:
    verdict = "pass" if result.passed else "fail"
    against = f"production (version {result.production_version})" if result.production_version else \
        "the no-category baseline only (no production version yet)"
    parts = [
        f"<h2>{esc(heading)}: version {esc(result.candidate_version)} against {esc(against)}</h2>",
        f'<p class="verdict {verdict}">{"PASSED" if result.passed else "FAILED"}</p>',
        f"<p>{esc(result.rows_note)}</p><p>Judge: {esc(result.how)}. Per-row loss: "
        f"{loss_name('regression' if result.primary_metric == 'rmse' else 'binary')}.</p>",
        "<h3>Checks</h3>", table(result.checks_frame()),
        "<h3>Downstream, same judged rows</h3>", table(result.downstream),
    ]
    for name, data in plots.items():
        if name.startswith("bootstrap"):
            parts.append(image(data, name))
    if result.comparisons:
        parts.append("<h3>Stability against production</h3>")
        # figures only: the movers lists get tables of their own below
        rows = [{k: v for k, v in comp.summary(top=0).items() if not isinstance(v, (list, dict))}
                for comp in result.comparisons.values()]
        parts.append(table(pd.DataFrame(rows)))
        for col, comp in result.comparisons.items():
            parts += movers_sections(col, comp, int(result.policy.get("top_movers", 10)))
            for name in (_plot_name("aligned", col), _plot_name("drift", col)):
                if name in plots:
                    parts.append(image(plots[name], name))
    if result.production_expectations:
        parts.append("<h3>The same expectations on production, for comparison</h3>")
        parts.append(table(pd.DataFrame([{"check": c.name, "verdict": {True: "pass", False: "FAIL", None: "info"}[
            c.passed], "figures": c.message} for c in result.production_expectations])))
    return parts


def record_gate_evidence(result: GateResult, *, by: str, reason: str, forced: bool, spec_path: str) -> str:
    """Log the gate's evidence as an MLflow run of the model's experiment; returns its run id."""
    from mlflow.entities import Metric

    from entivec.tasks.lifecycle.lineage import gate_params, log_data_input

    c = registry.client()
    experiment_id = registry.experiment_for(result.name)
    verdict = "pass" if result.passed else ("forced" if forced else "fail")
    run = c.create_run(
        experiment_id,
        run_name=f"gate {result.name} v{result.candidate_version} vs "
        f"{'v' + result.production_version if result.production_version else 'baseline'}",
        tags={
            "mlflow.user": by,
            "mlflow.source.name": "entivec promote",
            f"{registry.TAG_PREFIX}kind": "gate",
            f"{registry.TAG_PREFIX}candidate_version": result.candidate_version,
            f"{registry.TAG_PREFIX}production_version": result.production_version or "",
            f"{registry.TAG_PREFIX}verdict": verdict,
            f"{registry.TAG_PREFIX}reason": reason[:5000],
            f"{registry.TAG_PREFIX}data_fingerprint": result.data_fingerprint,
            f"{registry.TAG_PREFIX}spec_path": spec_path,
        },
    )
    run_id = run.info.run_id
    with registry.ending_run(c, run_id):
        stamp = int(datetime.now(UTC).timestamp() * 1000)
        metrics = [Metric("judged_rows", float(result.rows), stamp, 0)]
        for key, interval in result.intervals.items():
            for name, value in (("gain", interval.difference), ("low", interval.low), ("high", interval.high)):
                metrics.append(Metric(f"relative_{name}_vs_{key}", interval.relative(value), stamp, 0))
        for col, comp in result.comparisons.items():
            if np.isfinite(comp.drift):
                metrics.append(Metric("drift_" + _METRIC_UNSAFE.sub("_", col), comp.drift, stamp, 0))
        c.log_batch(run_id, metrics=[m for m in metrics if np.isfinite(m.value)], params=gate_params(result.policy))
        log_data_input(c, run_id, result.data_source or spec_path, {"sha256": result.data_fingerprint,
                       "rows": result.rows}, result.name, "evaluation")
        project_home().mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(prefix="gate-", dir=project_home()) as scratch:
            _write_gate_folder(result, Path(scratch), verdict=verdict, by=by, reason=reason, spec_path=spec_path)
            c.log_artifacts(run_id, scratch, GATE_FOLDER)
    return run_id


def _write_gate_folder(result: GateResult, folder: Path, *, verdict: str, by: str, reason: str, spec_path: str) -> None:
    """The evidence files: JSON, CSV tables, plots, and the HTML page that shows them."""
    plots = gate_plots(result)
    (folder / "plots").mkdir()
    for name, data in plots.items():
        (folder / "plots" / name).write_bytes(data)
    (folder / "evidence.json").write_text(json.dumps(result.to_dict(), indent=1), encoding="utf-8")
    result.checks_frame().to_csv(folder / "checks.csv", index=False)
    result.downstream.to_csv(folder / "downstream.csv", index=False)
    for col, comp in result.comparisons.items():
        comp.movers.to_csv(folder / f"movers_{column_file_stem(col)}.csv", index=False)
    title = f"{result.name} version {result.candidate_version}: promotion gate"
    body = [facts([("verdict", verdict), ("by", by), ("reason", reason), ("when", now_iso()),
                   ("spec", spec_path), ("data fingerprint", result.data_fingerprint)]),
            *gate_sections(result, plots)]
    (folder / GATE_REPORT).write_text(page(title, body), encoding="utf-8")


# --- the version report -----------------------------------------------------------------------------------------


def gate_runs(name: str, version: str) -> list:
    c = registry.client()
    experiment = c.get_experiment_by_name(f"entivec/{name}")
    if experiment is None:
        return []
    return c.search_runs(
        [experiment.experiment_id],
        filter_string=f"tags.`{registry.TAG_PREFIX}kind` = 'gate' and "
        f"tags.`{registry.TAG_PREFIX}candidate_version` = '{version}'",
        order_by=["attributes.start_time DESC"],
    )


def text_artifact(run_id: str, path: str) -> str | None:
    local = run_file(run_id, path)
    return local.read_text(encoding="utf-8") if local is not None and local.is_file() else None


def version_report_html(name: str, version: str) -> str:
    """The report of one version: what made it, how it did, every gate that judged it, its alias moves."""
    c = registry.client()
    mv = registry.resolve(name, version)
    number = str(mv.version)
    loaded = registry.load_version(name, number)
    run = c.get_run(mv.run_id)
    aliases = sorted(a for a, v in registry.aliases_of(name).items() if v == number)
    created = datetime.fromtimestamp(mv.creation_timestamp / 1000, UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    tags = mv.tags
    body = [facts([
        ("model", name), ("version", number), ("aliases now", ", ".join(aliases) or "none"),
        ("registered", created), ("train run", mv.run_id), ("trained by", run.data.tags.get("mlflow.user")),
        ("data fingerprint", tags.get(f"{registry.TAG_PREFIX}data_fingerprint")),
        ("spec hash", tags.get(f"{registry.TAG_PREFIX}spec_hash")),
        ("rows used", tags.get(f"{registry.TAG_PREFIX}rows_used")),
        ("vectors help (train evidence)", tags.get(f"{registry.TAG_PREFIX}vectors_help")),
        ("tracking store", _without_credentials(tracking_uri())),
    ])]
    vs = loaded.vector_set
    body += ["<h2>Vocabularies and vectors</h2>", table(pd.DataFrame([
        {"column": col, "categories": vs.vocabularies[col].size - 1, "dimension": vs.dimension(col),
         "rows mapped to unknown": vs.vocabularies[col].counts[0],
         "norm median": float(np.median(np.linalg.norm(vs.vectors[col][1:], axis=1))) if vs.vocabularies[col].size > 1
         else float("nan")}
        for col in vs.columns]))]
    stability = text_artifact(mv.run_id, "evidence/seed_stability.json")
    if stability:  # written by train runs that measure it: what a new seed alone changes, per column
        figures = json.loads(stability)
        body += ["<h2>Seed stability</h2>",
                 '<p class="muted">Two networks trained on the same rows with different seeds: how much of a change '
                 "between versions a reseed alone would explain. Aligned distance is read like the drift of "
                 "<code>entivec diff</code>.</p>",
                 table(pd.DataFrame([{"column": col, **values} for col, values in figures.items()]))]
    body += _vector_sections(name, number, vs)
    summary = text_artifact(mv.run_id, "summary.md")
    if summary:
        body += ["<h2>Train run summary</h2>", markdown(summary)]
    comparison = text_artifact(mv.run_id, "evidence/comparison.csv")
    if comparison:
        body += ["<h2>Downstream evidence of the train run</h2>", table(pd.read_csv(io.StringIO(comparison)))]
    try:
        plot_files = [a.path for a in c.list_artifacts(mv.run_id, "plots") if a.path.endswith(".png")]
    except registry.answer_types():
        plot_files = []
    if plot_files:
        body.append("<h2>Plots of the train run</h2>")
        for path in sorted(plot_files):
            local = run_file(mv.run_id, path)
            if local is not None:
                body.append(image(local.read_bytes(), path))
    for gate_run in gate_runs(name, number):
        body += _gate_run_sections(gate_run)
    entries = [e for e in audit.read_history(name) if number in (e.from_version, e.to_version)]
    body += ["<h2>Alias moves involving this version</h2>",
             table(audit.history_frame(entries).drop(columns=["evidence_run"]))]
    return page(f"{name} version {number}", body)


def _vector_sections(name: str, number: str, vs) -> list[str]:
    """Per column: a map with the categories new since production ringed, and the confidence figures if any."""
    production = registry.aliases_of(name).get(registry.PRODUCTION)
    other = registry.load_version(name, production).vector_set if production and production != number else None
    parts = ["<h2>Maps of the vectors</h2>"]
    if other is None:
        parts.append('<p class="muted">No other production version to mark new categories against.</p>')
    for col in vs.columns:
        vocab = vs.vocabularies[col]
        new = set(vocab.categories[1:]) - set(other.vocabularies[col].categories[1:]) \
            if other is not None and col in other.vocabularies else set()
        parts.append(image(version_map(vocab, vs.vectors[col], new=new, against=f"production v{production}"),
                           f"map of {col}"))
        confidence = vs.confidence.get(col)
        if confidence is not None and len(confidence) > 1:
            known = confidence.iloc[1:]
            parts.append(f"<h3>How well the vectors of '{esc(col)}' are determined (least first)</h3>")
            parts.append(table(known.sort_values("relative_spread", ascending=False, na_position="first")
                               .drop(columns=["id"]).head(10)))
    return parts


def _without_credentials(uri: str) -> str:
    """A store URI fit to print: any user name and password removed."""
    parts = urlsplit(uri)
    if parts.username is None and parts.password is None:
        return uri
    host = parts.hostname or ""
    return urlunsplit(parts._replace(netloc=host + (f":{parts.port}" if parts.port else "")))


def _gate_run_sections(gate_run) -> list[str]:
    run_id = gate_run.info.run_id
    tags = gate_run.data.tags
    when = datetime.fromtimestamp(gate_run.info.start_time / 1000, UTC).strftime("%Y-%m-%d %H:%M UTC")
    evidence = text_artifact(run_id, f"{GATE_FOLDER}/evidence.json")
    if evidence is None:
        return []
    data = json.loads(evidence)
    verdict = tags.get(f"{registry.TAG_PREFIX}verdict", "")
    against = f"production version {data['production_version']}" if data.get("production_version") else "baseline"
    parts = [
        f"<h2>Gate of {esc(when)} against {esc(against)}: "
        f'<span class="{"pass" if verdict == "pass" else "fail"}">{esc(verdict.upper())}</span></h2>',
        facts([("by", tags.get("mlflow.user")), ("reason", tags.get(f"{registry.TAG_PREFIX}reason")),
               ("evidence run", run_id), ("rows", data.get("rows_note")), ("judge", data.get("how"))]),
        table(pd.DataFrame([{"group": ch["group"], "check": ch["name"],
                             "verdict": {True: "pass", False: "FAIL", None: "info"}[ch["passed"]],
                             "figures": ch["message"]} for ch in data["checks"]])),
        table(pd.DataFrame(data.get("downstream", []))),
    ]
    for artifact in sorted(a.path for a in registry.client().list_artifacts(run_id, f"{GATE_FOLDER}/plots")):
        local = run_file(run_id, artifact)
        if local is not None:
            parts.append(image(local.read_bytes(), artifact))
    return parts


@dataclass
class PublishedReport:
    path: Path
    run_id: str
    artifact_uri: str


def artifact_link(run_id: str, artifact: str) -> str:
    """Where a person opens a run artifact: a file URL on the embedded store, the MLflow UI on a server."""
    c = registry.client()
    run = c.get_run(run_id)
    uri = tracking_uri()
    if uri.startswith(("http://", "https://")):
        return f"{uri.rstrip('/')}/#/experiments/{run.info.experiment_id}/runs/{run_id}/artifacts/{artifact}"
    return f"{run.info.artifact_uri.rstrip('/')}/{artifact}"


def publish_version_report(name: str, version: str, out: str | Path | None = None) -> PublishedReport:
    """Write a version's report, log it to its train run, and link it from the current Prefect run (if any)."""
    mv = registry.resolve(name, version)
    number = str(mv.version)
    text = version_report_html(name, number)
    path = Path(out) if out else project_home() / "reports" / name / f"version-{number}.html"
    write_text_atomically(path, text, "the report")  # all or nothing, mode per umask
    with tempfile.TemporaryDirectory(prefix="report-", dir=project_home()) as scratch:
        staged = Path(scratch) / VERSION_REPORT  # the artifact's name is fixed, whatever ``out`` is called
        staged.write_text(text, encoding="utf-8")
        registry.client().log_artifact(mv.run_id, str(staged), REPORT_FOLDER)
    link = artifact_link(mv.run_id, f"{REPORT_FOLDER}/{VERSION_REPORT}")
    if "prefect" in sys.modules:  # only a Prefect run has a page to link from, and it has loaded Prefect
        from entivec.tasks.lifecycle.track import link_in_prefect

        link_in_prefect(f"{name}-v{number}-report", link, f"{name} version {number}: report",
                    f"Report of **{name}** version {number}, written {now_iso()} by {operator()}.")
    return PublishedReport(path, mv.run_id, link)


# ``publish_version_report_task``: the publish step as a Prefect task, made when a flow first asks for it, so
# ``entivec report`` does not load Prefect.
__getattr__ = tasks_on_first_use(globals(), publish_version_report_task=(
    publish_version_report, {"name": "publish-version-report", "retries": 1}))


# --- the comparison of two versions -----------------------------------------------------------------------------


def diff_html(
    name: str,
    older: str,
    newer: str,
    comparisons: dict[str, ColumnComparison],
    summary: pd.DataFrame,
    metrics: pd.DataFrame,
    judged: pd.DataFrame | None,
    notes: list[str],
) -> str:
    """The comparison of two versions as one self-contained page."""
    try:  # the newer vector set, to show where its new categories lie (versions are cached locally)
        newer_set = registry.load_version(name, newer).vector_set
    except (registry.RegistryError, *registry.answer_types(), OSError):
        newer_set = None
    body = [f"<p>From version {esc(older)} (reference) to version {esc(newer)} (aligned onto the reference).</p>"]
    body += [f'<p class="muted">{esc(n)}</p>' for n in notes]
    body += ["<h2>Per column</h2>", table(summary)]
    body += ["<h2>Downstream metrics side by side</h2>", table(metrics)]
    if judged is not None:
        body += ["<h2>Both judged on the same held-out rows</h2>", table(judged)]
    for col, comp in comparisons.items():
        body.append(f"<h2>'{esc(col)}'</h2>")
        changes = []
        if comp.added:
            changes.append(f"new in version {newer} ({len(comp.added)}): {', '.join(comp.added[:50])}")
        if comp.dropped:
            changes.append(f"dropped ({len(comp.dropped)}): {', '.join(comp.dropped[:50])}")
        body.append(f"<p>{esc('; '.join(changes) or 'same categories in both')}</p>")
        body += movers_sections(col, comp, 15)
        if len(comp.shared) >= 2:
            body.append(image(aligned_map(comp, f"v{older}", f"v{newer}"), f"aligned map of {col}"))
            body.append(image(drift_bars(comp), f"drift of {col}"))
        if comp.added and newer_set is not None and col in newer_set.vectors:  # where the new categories landed
            body.append(image(version_map(newer_set.vocabularies[col], newer_set.vectors[col], new=set(comp.added),
                                          against=f"version {older}"), f"new categories of {col}"))
    return page(f"{name}: version {older} → version {newer}", body)


def write_diff_html(diff: VersionDiff, out: str | Path) -> Path:
    """The comparison of two versions (``versiondiff.diff_versions``) as one HTML file, all or nothing."""
    page_text = diff_html(diff.name, diff.older, diff.newer, diff.comparisons, diff.summary, diff.metrics,
                          diff.judged, diff.notes)
    return write_text_atomically(out, page_text, "the diff report")
