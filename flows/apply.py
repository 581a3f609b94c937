"""The apply flow: give every row of a CSV or Parquet table the vectors of one registered version."""

from __future__ import annotations

import re
from contextlib import nullcontext

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_markdown_artifact
from prefect.cache_policies import NO_CACHE
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from entivec.tasks.apply.batch import DEFAULT_CHUNK_ROWS, ApplyResult, apply_file_task
from entivec.tasks.apply.lookup import DEFAULT_UNKNOWN, check_unknown_rule
from entivec.tasks.lifecycle import registry


@task(name="load-vectors", retries=2, retry_delay_seconds=2, cache_policy=NO_CACHE)
def load_vectors(model_name: str, version: str) -> registry.LoadedVersion:
    return registry.load_version(model_name, version)


def aliases_on(model_name: str, version: str, asked: str) -> list[str]:
    """The aliases that point at ``version`` now (and the one the user named, if any)."""
    on = {a for a, v in registry.aliases_of(model_name).items() if str(v) == str(version)}
    if not str(asked).isdigit():
        on.add(str(asked))
    return sorted(on)


@task(name="log-report", cache_policy=NO_CACHE)
def log_report(result: ApplyResult) -> None:
    """The run's record names the version that produced the output, as the output's own metadata does.

    A markdown artifact on the flow run always carries it (entivec keeps Prefect's console at WARNING, which
    also keeps INFO lines out of the run log); the same lines go to the run log when INFO is enabled.
    """
    create_markdown_artifact(
        markdown=report_markdown(result),
        key=re.sub(r"[^a-z0-9-]+", "-", f"apply-{result.model_name}".lower()).strip("-"),
        description=f"{result.model_name} version {result.version} applied to {result.input_path}",
    )
    logger = get_run_logger()
    logger.info(
        "applied %s version %s (run %s, unknown rule %r) to %s -> %s: %d rows in %d chunk(s), %.1f s",
        result.model_name, result.version, result.run_id, result.unknown, result.input_path, result.output_path,
        result.rows, result.chunks, result.seconds,
    )
    for row in result.report_rows():
        top = ", ".join(f"{c!r} x{n}" for c, n in row["top_unseen"]) or "none"
        logger.info(
            "column %s: %d rows, %.2f%% unknown (%d missing, %d unseen); most frequent unseen: %s",
            row["column"], row["rows"], 100 * row["unknown_share"], row["missing"], row["unseen"], top,
        )


def report_markdown(result: ApplyResult) -> str:
    lines = [
        f"**{result.model_name}** version **{result.version}** (run `{result.run_id}`)"
        + (f", aliases {', '.join(result.aliases)}" if result.aliases else "")
        + f", unknown-category rule `{result.unknown}`"
        + (f", trained on data `{result.data_fingerprint[:12]}`" if result.data_fingerprint else ""),
        "",
        f"{result.input_path} -> {result.output_path}: {result.rows:,} rows in {result.chunks} chunk(s), "
        f"written {result.created_at}",
        "",
        "| column | rows | unknown | missing | unseen | unknown share | most frequent unseen |",
        "|---|---:|---:|---:|---:|---:|---|",
    ]
    for row in result.report_rows():
        top = ", ".join(f"{c} ({n})" for c, n in row["top_unseen"]).replace("|", "\\|")
        lines.append(
            f"| {row['column']} | {row['rows']:,} | {row['unknown']:,} | {row['missing']:,} | {row['unseen']:,} "
            f"| {100 * row['unknown_share']:.2f}% | {top} |"
        )
    return "\n".join(lines)


@flow(name="apply", flow_run_name="apply {model_name}@{version}", validate_parameters=False)
def apply(
    model_name: str,
    input_path: str,
    output_path: str,
    version: str = registry.PRODUCTION,
    columns: list[str] | None = None,
    unknown: str = DEFAULT_UNKNOWN,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    show_progress: bool = False,
    max_unknown_share: float | None = None,
) -> ApplyResult:
    """Append the vectors of ``model_name`` at ``version`` (number or alias) to a table, written as Parquet.

    ``input_path`` is a file, a glob or a partitioned folder. ``columns`` limits the work to some of the vector
    set's columns (default: all, each must be present); ``unknown`` is the unknown-category rule shared with the
    transformer and the served model; ``max_unknown_share`` fails the job, writing nothing, when any column's
    share of rows that met that rule is above it.
    """
    check_unknown_rule(unknown)
    loaded = load_vectors(model_name, str(version))
    aliases = aliases_on(model_name, loaded.version, str(version))
    bar = _progress_bar() if show_progress else None
    with bar or nullcontext():
        job = bar.add_task(f"{model_name} v{loaded.version}", total=None) if bar else None
        result = apply_file_task(
            model_name=model_name, version=loaded.version, run_id=loaded.run_id, vector_set=loaded.vector_set,
            input_path=input_path, output_path=output_path, columns=columns, unknown=unknown,
            chunk_rows=chunk_rows, max_unknown_share=max_unknown_share, aliases=aliases,
            progress=(lambda done, total: bar.update(job, completed=done, total=total or None)) if bar else None,
        )
    log_report(result)
    return result


def _progress_bar() -> Progress:
    return Progress(
        TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(), TextColumn("rows"),
        TimeElapsedColumn(), console=Console(stderr=True), transient=False,
    )
