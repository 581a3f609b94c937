"""Comparing two versions of a model (``entivec diff``): a read of the registry, no flow run and no server.

Apart from ``flows/lifecycle.py`` so that a diff loads neither Prefect nor the training libraries; only a diff
judged on the same held-out rows (``--spec``) imports the gate's downstream models.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.compare import ColumnComparison, columns_of, compare_vector_sets, comparison_table


@dataclass
class VersionDiff:
    name: str
    older: str
    newer: str
    comparisons: dict[str, ColumnComparison]
    summary: pd.DataFrame
    metrics: pd.DataFrame
    judged: pd.DataFrame | None
    notes: list[str]  # the page of it: tasks/present/report.py write_diff_html


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
    from entivec.tasks.ingest.clean import validate_and_clean
    from entivec.tasks.ingest.fingerprint import data_fingerprint
    from entivec.tasks.ingest.read import read_source
    from entivec.tasks.ingest.split import split_rows
    from entivec.tasks.lifecycle import checks, gate
    from entivec.tasks.lifecycle.rows import spec_for, unseen_rows

    spec, spec_file = spec_for(name, newer, spec_path)
    raw, files = read_source(spec, spec_file)
    cleaned = validate_and_clean(raw, spec, files)
    train_rows, test_rows = split_rows(cleaned.frame, spec.split, spec.id_name)
    labels = {f"v{older.version}": older, f"v{newer.version}": newer}
    rows = unseen_rows(test_rows, spec, labels, data_fingerprint(raw, files)["sha256"])
    if len(rows.frame) < 2:
        raise registry.LifecycleError(f"no held-out rows of {spec_file} are unseen by both versions; cannot judge them")
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
