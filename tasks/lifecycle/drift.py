"""
Profile. Every train run stores ``data/profile.json``: the coarse type of every column as read, the spec's role
of each column, and per feature column what its training rows looked like. Embedded columns point at their
vocabulary (it already holds the category counts); one-hot columns keep their category counts; numeric columns
and the target keep fixed quantile bin edges of the training rows, the row count per bin and the missing count.

Drift. A new drop is compared with the data of the production version:

- PSI (population stability index) per column, ``sum((a - e) * ln(a / e))`` over the shares of rows per bin in
  the drop (a) and in production's training rows (e). Numeric columns use production's own bin edges (plus a
  bin for missing values). Categorical columns use production's most frequent categories as bins (at most
  ``drift.category_bins``, the rest of the known ones pooled in one bin, plus missing): with one bin per
  category a column of thousands would read as drifted from sampling noise alone, because the PSI of two
  samples of one distribution grows with the number of bins over the number of rows. Rows whose category
  production never saw are left out of the PSI and measured by the new-category share instead, so one
  change is not counted twice. A bin empty on one side gets the share ``EPSILON`` (then shares are
  renormalised), since ln(0) has no value; bins empty on both sides are dropped.
- New-category share per categorical column: rows whose category is not in production's vocabulary (one-hot
  columns: not among production's profiled categories), over all rows of the drop.
- Schema changes against the production version's profile and spec: columns added to or removed from the data,
  a column's type changed, a column's role in the spec changed.

Versions trained before profiles existed fall back to their vocabulary counts for embedded columns; their
one-hot and numeric columns are reported as "not profiled", and only column names (from the data
fingerprint) are compared for the schema.

Outcomes that train nothing (a retrain stopped by drift, a drop already trained on) are recorded as MLflow runs
of the model's experiment tagged ``entivec.kind`` = ``train-stopped`` or ``train-skipped``; a stopped run
holds the drift report. They never touch the registry: no version, no alias move.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import Spec, SpecError, load_spec
from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import Vocabulary, category_strings
from entivec.tasks.ingest.clean import validate_and_clean
from entivec.tasks.ingest.fingerprint import data_fingerprint
from entivec.tasks.ingest.read import InputError, read_source
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.profile import (
    EPSILON,
    FINGERPRINT_ARTIFACT,
    PROFILE_ARTIFACT,
    PROFILE_FORMAT,
    PSI_READING,
    column_roles,
    data_columns,
    numbers,
    psi,
    psi_reading,
)
from entivec.tasks.lifecycle.registry import run_file, version_spec
from entivec.tasks.lifecycle.track import now_iso

REPORT_FOLDER = "drift"


# --- what production trained on ---------------------------------------------------------------------------------


@dataclass
class Reference:
    """The version a drop is compared with, and what is known of the data it trained on."""

    name: str
    version: str
    alias: str
    run_id: str
    vector_set: VectorSet
    profile: dict[str, Any] | None
    spec: Spec | None
    data_columns: dict[str, str | None]  # column -> kind as read (None when only the name was recorded)


def _json_artifact(run_id: str, path: str) -> dict | None:
    local = run_file(run_id, path)
    if local is None or not local.is_file():
        return None
    return json.loads(local.read_text(encoding="utf-8"))


def load_reference(name: str, alias: str = registry.PRODUCTION) -> Reference | None:
    """The version ``alias`` points at, with its profile; None when the model or the alias does not exist.

    Only a real absence is None: a store that cannot be read raises ``RegistryUnavailable`` (retried by the
    task), never "no production", which would train from scratch with new category ids and no drift check.
    """
    if registry.find_model(name) is None or registry.find_alias(name, alias) is None:
        return None
    loaded = registry.load_version(name, alias)
    profile = _json_artifact(loaded.run_id, PROFILE_ARTIFACT)
    if profile is not None and profile.get("format") != PROFILE_FORMAT:
        profile = None
    if profile is not None:
        data_columns: dict[str, str | None] = dict(profile["data_columns"])
    else:
        fingerprint = _json_artifact(loaded.run_id, FINGERPRINT_ARTIFACT) or {}
        data_columns = {str(c): None for c in fingerprint.get("columns", [])}
    return Reference(name, loaded.version, alias, loaded.run_id, loaded.vector_set, profile,
                     version_spec(loaded), data_columns)


@task(name="production-reference", retries=2, retry_delay_seconds=2, retry_condition_fn=registry.retry_on_unavailable)
def load_reference_task(name: str, alias: str = registry.PRODUCTION) -> Reference | None:
    return load_reference(name, alias)


# --- the report -------------------------------------------------------------------------------------------------


@dataclass
class ColumnDrift:
    column: str
    role: str
    kind: str  # categorical | numeric
    basis: str  # profile | vocabulary | not profiled
    psi: float | None = None
    reading: str = "not profiled"
    bins: int = 0
    new_category_share: float | None = None
    new_categories: int = 0
    new_examples: list[str] = field(default_factory=list)
    missing_share: float | None = None
    reference_missing_share: float | None = None
    ignored: bool = False


@dataclass
class SchemaChange:
    column: str
    change: str  # added | removed | type_changed | role_changed
    before: str
    after: str
    affects_model: bool


@dataclass
class DriftReport:
    name: str
    against_alias: str
    against_version: str
    rows: int
    reference_rows: int | None
    data_fingerprint: str
    thresholds: dict[str, Any]
    columns: list[ColumnDrift]
    schema_changes: list[SchemaChange]
    breaches: list[str]
    notes: list[str]
    at: str = field(default_factory=now_iso)

    @property
    def passed(self) -> bool:
        return not self.breaches

    def column(self, name: str) -> ColumnDrift:
        for c in self.columns:
            if c.column == name:
                return c
        raise KeyError(name)

    def largest(self, attribute: str) -> float:
        values = [getattr(c, attribute) for c in self.columns if getattr(c, attribute) is not None]
        return float(max(values, default=0.0))

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["passed"] = self.passed
        return out

    def markdown(self) -> str:
        verdict = "passed" if self.passed else f"**stopped** ({len(self.breaches)} reason(s))"
        lines = [
            f"# Drift of new {self.name} data against {self.against_alias} (version {self.against_version})",
            "",
            f"Verdict: {verdict}. Rows compared: {self.rows} in the new data (model-ready), "
            f"{self.reference_rows if self.reference_rows is not None else 'unknown'} in the version's training "
            f"rows. Data fingerprint {self.data_fingerprint[:12]}; checked {self.at}.",
            "",
        ]
        if self.breaches:
            lines += ["Why it stopped:", *[f"- {b}" for b in self.breaches], ""]
        lines += ["| column | role | basis | PSI | reading | new-category share | new categories | missing (was) |",
                  "| --- | --- | --- | --- | --- | --- | --- | --- |"]
        for c in self.columns:
            value = "—" if c.psi is None else f"{c.psi:.4f}"
            share = "—" if c.new_category_share is None else f"{c.new_category_share:.2%}"
            new = "—" if c.new_category_share is None else str(c.new_categories) + (
                f" (e.g. {', '.join(c.new_examples[:3])})" if c.new_examples else "")
            was = "?" if c.reference_missing_share is None else f"{c.reference_missing_share:.1%}"
            missing = "—" if c.missing_share is None else f"{c.missing_share:.1%} ({was})"
            label = c.column + (" (ignored)" if c.ignored else "")
            lines.append(f"| {label} | {c.role} | {c.basis} | {value} | {c.reading} | {share} | {new} | {missing} |")
        lines += ["", "Schema changes:" if self.schema_changes else "Schema changes: none."]
        for s in self.schema_changes:
            used = "used by the model" if s.affects_model else "not used by the model"
            lines.append(f"- {s.column}: {s.change.replace('_', ' ')} ({s.before} → {s.after}; {used})")
        t = self.thresholds
        lines += ["", f"Thresholds (spec `drift:`): max_psi {t['max_psi']}, max_new_category_share "
                  f"{t['max_new_category_share']}, on_schema_change {t['on_schema_change']}.", ""]
        lines += [f"- {n}" for n in self.notes]
        return "\n".join(lines) + "\n"

    def stop_message(self, run_id: str = "") -> str:
        where = f" Report and reason recorded in MLflow run {run_id}." if run_id else ""
        return (
            f"retrain of {self.name!r} stopped by the drift check against {self.against_alias} version "
            f"{self.against_version}: " + "; ".join(self.breaches) + ". Nothing was registered and "
            f"{self.against_alias} is unchanged.{where} If the change is expected, adjust the spec's drift: section "
            "(max_psi, max_new_category_share, on_schema_change: warn, or the column under ignore), or train "
            "without --incremental."
        )


class DriftStop(InputError):
    """A new data drop that breaks the spec's drift thresholds; the retrain stops before training."""

    def __init__(self, report: DriftReport, run_id: str = "") -> None:
        super().__init__(report.stop_message(run_id))
        self.report = report
        self.run_id = run_id


def _category_bins(
    known: pd.Series, known_missing: int, drop: pd.Series, max_bins: int
) -> tuple[np.ndarray, np.ndarray, pd.Series]:
    """Expected and actual rows per bin for a categorical column, and the drop's rows per new category."""
    strings = category_strings(drop)
    observed = strings.value_counts(dropna=True)
    is_known = observed.index.isin(known.index)
    new = observed[~is_known].sort_values(ascending=False, kind="stable")
    actual_known = observed[is_known].reindex(known.index, fill_value=0)
    order = known.sort_values(ascending=False, kind="stable").index
    top, rest = order[: max_bins - 1], order[max_bins - 1:]
    if len(order) <= max_bins:
        top, rest = order, order[:0]
    expected = [*known[top].tolist(), int(known[rest].sum()), int(known_missing)]
    actual = [*actual_known[top].tolist(), int(actual_known[rest].sum()), int(strings.isna().sum())]
    return np.asarray(expected, dtype="float64"), np.asarray(actual, dtype="float64"), new


def _categorical_drift(col: ColumnDrift, known: pd.Series, known_missing: int, known_rows: int,
                       drop: pd.Series, max_bins: int) -> None:
    expected, actual, new = _category_bins(known, known_missing, drop, max_bins)
    col.bins = int(((expected > 0) | (actual > 0)).sum())
    col.psi = psi(expected, actual) if actual.sum() > 0 else None
    col.reading = psi_reading(col.psi) if col.psi is not None else "all rows new"
    col.new_category_share = float(new.sum()) / len(drop) if len(drop) else 0.0
    col.new_categories = int(len(new))
    col.new_examples = [str(c) for c in new.index[:5]]
    col.missing_share = float(actual[-1]) / len(drop) if len(drop) else None
    col.reference_missing_share = known_missing / known_rows if known_rows else None


def _numeric_drift(col: ColumnDrift, profiled: dict[str, Any], drop: pd.Series) -> None:
    x = numbers(drop)
    present = np.isfinite(x)
    edges = np.asarray(profiled["edges"], dtype="float64")
    counts = np.bincount(np.searchsorted(edges, x[present], side="left"), minlength=len(edges) + 1)
    expected = np.asarray([*profiled["counts"], profiled["missing"]], dtype="float64")
    actual = np.asarray([*counts.tolist(), int((~present).sum())], dtype="float64")
    col.bins = int(((expected > 0) | (actual > 0)).sum())
    col.psi = psi(expected, actual)
    col.reading = psi_reading(col.psi)
    col.missing_share = float((~present).sum()) / len(x) if len(x) else None
    col.reference_missing_share = profiled["missing"] / profiled["rows"] if profiled["rows"] else None


def _kind_read_as(spec: Spec | None, column: str) -> str:
    # Category and id columns are always read as text, whatever the file holds.
    if spec is None:
        return "inferred"
    return "text" if column in (spec.id_name, *spec.embed_names, *spec.onehot_names) else "inferred"


def schema_changes(reference: Reference, raw: pd.DataFrame | dict[str, str],
                   spec: Spec) -> tuple[list[SchemaChange], list[str]]:
    """Columns added, removed, retyped or given another role, against the reference version (``raw``: the table
    as read, or the column kinds a streamed read tallied)."""
    notes: list[str] = []
    now = data_columns(raw)
    before = reference.data_columns
    roles_now = column_roles(spec)
    roles_before = (column_roles(reference.spec) if reference.spec is not None
                    else (reference.profile or {}).get("roles"))
    used = set(roles_now) | set(roles_before or {})
    changes: list[SchemaChange] = []
    if before:
        for c in now:
            if c not in before:
                changes.append(SchemaChange(c, "added", "absent", now[c], c in used))
        for c in before:
            if c not in now:
                changes.append(SchemaChange(c, "removed", before[c] or "present", "absent", c in used))
        typed = [c for c in now if before.get(c) is not None]
        for c in typed:
            # A role change that alters how a column is read shows as that role change, not as a new type.
            same_reading = _kind_read_as(reference.spec, c) == _kind_read_as(spec, c)
            if before[c] != now[c] and same_reading:
                changes.append(SchemaChange(c, "type_changed", str(before[c]), now[c], c in used))
        if not any(v is not None for v in before.values()):
            notes.append("the version recorded column names only (trained before data profiles), so types were "
                         "not compared")
    else:
        notes.append("the version recorded no columns of its data, so columns were not compared")
    if roles_before is not None:
        for c in sorted(set(roles_now) | set(roles_before)):
            if roles_now.get(c, "unused") != roles_before.get(c, "unused"):
                changes.append(SchemaChange(c, "role_changed", roles_before.get(c, "unused"),
                                            roles_now.get(c, "unused"), True))
    else:
        notes.append("the version's spec could not be read, so column roles were not compared")
    return changes, notes


def compare(reference: Reference, raw: pd.DataFrame | dict[str, str], rows: pd.DataFrame, spec: Spec,
            fingerprint_sha: str = "", rows_in_drop: int | None = None) -> DriftReport:
    """Drift of a new drop (``raw`` as read or its column kinds, ``rows`` its model-ready rows) against
    ``reference``. ``rows_in_drop``: the drop's model-ready rows when ``rows`` is a seeded sample of them."""
    limits = spec.drift
    profile = reference.profile or {}
    profiled = profile.get("columns", {})
    notes = [PSI_READING + ".",
             f"Bins empty on one side get a share of {EPSILON:g} before the PSI is taken (ln 0 has no value).",
             "Rows with a category production never saw are counted in the new-category share, not in the PSI."]
    columns: list[ColumnDrift] = []
    roles = column_roles(spec)
    for name in [*spec.embed_names, *spec.onehot_names]:
        col = ColumnDrift(name, roles[name], "categorical", "not profiled", ignored=name in limits.ignore)
        vocab: Vocabulary | None = reference.vector_set.vocabularies.get(name) if name in spec.embed_names else None
        if vocab is not None:
            col.basis = "vocabulary"
            known = pd.Series(vocab.counts[1:], index=pd.Index(vocab.categories[1:], dtype="string"), dtype="int64")
            known_rows = profiled.get(name, {}).get("rows", int(sum(vocab.counts)))
            _categorical_drift(col, known, vocab.unknown_count, known_rows, rows[name], limits.category_bins)
        elif profiled.get(name, {}).get("counts") is not None:
            col.basis = "profile"
            entry = profiled[name]
            known = pd.Series(entry["counts"], dtype="int64")
            known.index = pd.Index(known.index, dtype="string")
            _categorical_drift(col, known, entry["missing"], entry["rows"], rows[name], limits.category_bins)
        columns.append(col)
    for name in [*spec.numeric_names, spec.target.column]:
        col = ColumnDrift(name, roles[name], "numeric", "not profiled", ignored=name in limits.ignore)
        entry = profiled.get(name)
        if entry is not None and entry.get("kind") == "numeric":
            col.basis = "profile"
            _numeric_drift(col, entry, rows[name])
        columns.append(col)
    if reference.profile is None:
        notes.append(f"version {reference.version} was trained before data profiles were kept: embedded columns are "
                     "compared with its vocabulary counts, other columns are not profiled")

    if rows_in_drop is not None and rows_in_drop != len(rows):
        notes.append(f"Shares, bins and new categories are those of a seeded sample of {len(rows):,} of the drop's "
                     f"{rows_in_drop:,} model-ready rows (evaluation.max_fold_rows).")
    changes, schema_notes = schema_changes(reference, raw, spec)
    notes += schema_notes
    breaches: list[str] = []
    for c in columns:
        if c.ignored:
            continue
        if c.psi is not None and c.psi > limits.max_psi:
            breaches.append(f"column {c.column!r}: PSI {c.psi:.3f} > drift.max_psi {limits.max_psi:g} ({c.reading} "
                            "shift)")
        if c.new_category_share is not None and c.new_category_share > limits.max_new_category_share:
            breaches.append(
                f"column {c.column!r}: {c.new_category_share:.1%} of rows have a category {reference.alias} never "
                f"saw ({c.new_categories} new, e.g. {', '.join(map(repr, c.new_examples[:3]))}) > "
                f"drift.max_new_category_share {limits.max_new_category_share:g}"
            )
    for s in changes:
        if not s.affects_model or s.column in limits.ignore:
            continue
        text = f"schema: column {s.column!r} {s.change.replace('_', ' ')} ({s.before} → {s.after})"
        if limits.on_schema_change == "stop":
            breaches.append(text)
        else:
            notes.append(text + " (drift.on_schema_change is warn)")
    return DriftReport(
        name=spec.name, against_alias=reference.alias, against_version=reference.version,
        rows=int(len(rows) if rows_in_drop is None else rows_in_drop),
        reference_rows=profile.get("rows"), data_fingerprint=fingerprint_sha,
        thresholds=limits.model_dump(mode="json"), columns=columns, schema_changes=changes, breaches=breaches,
        notes=notes,
    )


@task(name="check-drift", cache_policy=NO_CACHE)
def compare_task(reference: Reference, raw: pd.DataFrame | dict[str, str], rows: pd.DataFrame, spec: Spec,
                 fingerprint_sha: str = "", rows_in_drop: int | None = None) -> DriftReport:
    return compare(reference, raw, rows, spec, fingerprint_sha, rows_in_drop)


def write_report(report: DriftReport, folder: Path) -> Path:
    """``report.json`` and ``report.md`` in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "report.json").write_text(json.dumps(report.to_dict(), indent=1, default=str), encoding="utf-8")
    (folder / "report.md").write_text(report.markdown(), encoding="utf-8")
    return folder


def publish_in_prefect(report: DriftReport) -> None:
    """The report as a Prefect markdown artifact of the current run (one key per model, so runs line up)."""
    from entivec.tasks.lifecycle.track import markdown_in_prefect

    markdown_in_prefect(f"{report.name}-drift", report.markdown(),
                        f"Drift of new {report.name} data against {report.against_alias} version "
                        f"{report.against_version}: {'passed' if report.passed else 'stopped'}")


# --- starting from production -----------------------------------------------------------------------------------


def with_source(spec: Spec, source: str) -> Spec:
    """The spec reading from ``source`` (a file or glob; a relative one is taken from the working folder)."""
    return spec.with_source(source)


def warm_start(spec: Spec, spec_path: str, start: VectorSet, version: str,
               sizes: list[int]) -> tuple[dict[str, np.ndarray], list[int]]:
    """Starting vectors from ``start`` and the table widths that fit them.

    A column sized by a rule keeps the starting version's width (a grown vocabulary could otherwise give a new
    width); a column with an explicit ``size`` that differs cannot start from those vectors.
    """
    widths = []
    for col, size in zip(spec.columns.embed, sizes, strict=True):
        if col.name not in start.vectors:
            widths.append(size)
            continue
        width = start.dimension(col.name)
        if col.size is not None and col.size != width:
            raise SpecError(
                f"spec file {spec_path}: key 'columns.embed' sets size {col.size} for {col.name!r}, but version "
                f"{version} has {width}-d vectors; a warm start needs the same width (set size: {width}, or train "
                "without --warm-start)"
            )
        widths.append(width)
    vectors = {c: start.vectors[c] for c in spec.embed_names if c in start.vectors}
    return vectors, widths


# --- the `entivec drift` command --------------------------------------------------------------------------------


def drift_against(name: str, source: str | None = None, spec_path: str | None = None,
                  alias: str = registry.PRODUCTION) -> DriftReport:
    """The drift report of a drop against ``alias`` without training or recording anything."""
    if source is None and spec_path is None:
        raise SpecError("name the new data with --source PATH (or a spec whose source is the new data)")
    registry.resolve(name, alias)  # the registry's own message for a missing model or alias
    reference = load_reference(name, alias)
    if spec_path is not None:
        spec = load_spec(spec_path)
        if spec.name != name:
            raise SpecError(f"spec file {spec_path} describes model {spec.name!r}, not {name!r}")
    elif reference.spec is not None:
        spec = reference.spec
        spec_path = str(Path.cwd() / f"{name}-v{reference.version}.spec.yaml")  # only names it in messages
    else:
        raise SpecError(f"{name!r} version {reference.version} has no readable spec; pass --spec PATH")
    if source is not None:
        spec = with_source(spec, source)
    raw, files = read_source(spec, spec_path)
    cleaned = validate_and_clean(raw, spec, files)
    return compare(reference, raw, cleaned.frame, spec, data_fingerprint(raw, files)["sha256"])
