"""The `entivec` command: a thin layer over the flows, with plain messages and non-zero exits on failure."""

from __future__ import annotations

import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.table import Table

app = typer.Typer(
    name="entivec",
    help="Retrain, judge, version and apply entity embeddings (vectors) of high-cardinality categories.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
console = Console()
errors = Console(stderr=True)

EXIT_INPUT = 2  # bad spec, bad data, unknown name/version: the user can fix it
EXIT_FAILED = 1  # anything else


def _fail(message: str, code: int = EXIT_INPUT) -> None:
    errors.print(f"[bold red]error:[/] {message}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


def _user_errors() -> tuple[type[BaseException], ...]:
    from entivec.schemas.ledger import LedgerMismatch
    from entivec.schemas.spec import SpecError
    from entivec.tasks.apply.outputs import OutputError
    from entivec.tasks.ingest.read import InputError
    from entivec.tasks.lifecycle.registry import RegistryError

    return (SpecError, InputError, RegistryError, LedgerMismatch, OutputError)


def _run(call):
    """Run a flow or a read, turning the errors a user can fix into one clear message and exit code 2."""
    user_errors = _user_errors()
    try:
        return call()
    except typer.Exit:
        raise
    except user_errors as exc:
        _fail(str(exc))
    except Exception as exc:  # noqa: BLE001 - the last line of defence prints, never a bare traceback
        cause = exc
        while cause.__cause__ is not None and not isinstance(cause, user_errors):
            cause = cause.__cause__
        if isinstance(cause, user_errors):
            _fail(str(cause))
        _fail(f"{type(exc).__name__}: {exc}", EXIT_FAILED)


DASK_HELP = (
    "Run the independent networks (cross-fitting folds, sweep candidates) on Dask: 'local' for a temporary "
    "cluster on this machine, or a scheduler address such as tcp://host:8786. Default: ENTIVEC_DASK_ADDRESS, "
    "else no Dask."
)
WORKERS_HELP = "Worker processes of a --dask local cluster (one thread each)."


@app.command()
def train(
    spec: Annotated[Path, typer.Argument(help="The dataset spec (YAML) to train from.")],
    vocabulary_from: Annotated[
        str | None,
        typer.Option(help="Keep the category ids of this version or alias of the same model (e.g. production)."),
    ] = None,
    source: Annotated[
        str | None,
        typer.Option(help="Read the data from this file or glob (a new drop) instead of the spec's source."),
    ] = None,
    incremental: Annotated[
        bool,
        typer.Option(help="Reuse production's vocabulary and first check the data for drift against production's "
                     "training data; stop (exit 2, nothing registered) when the spec's drift: thresholds break."),
    ] = False,
    warm_start: Annotated[
        bool,
        typer.Option(help="Start the embedding tables from the vectors of the version whose vocabulary is reused "
                     "(needs --incremental or --vocabulary-from)."),
    ] = False,
    skip_unchanged: Annotated[
        bool,
        typer.Option(help="Train nothing when the latest version has the same data fingerprint and spec; the "
                     "skip is recorded."),
    ] = False,
    dask: Annotated[str | None, typer.Option(help=DASK_HELP)] = None,
    workers: Annotated[int, typer.Option(min=1, help=WORKERS_HELP)] = 2,
) -> None:
    """Validate, clean, train vectors, judge them downstream and register the result as `staging`."""
    from entivec.flows.parallel import run_flow
    from entivec.flows.train import train as train_flow

    if warm_start and not (incremental or vocabulary_from):
        _fail("--warm-start needs a version to start from: add --incremental (production) or --vocabulary-from")
    outcome = _run(lambda: run_flow(
        train_flow, dask, workers=workers, spec_path=str(spec), vocabulary_from=vocabulary_from, source=source,
        incremental=incremental, warm_start=warm_start, skip_unchanged=skip_unchanged,
    ))
    if outcome.status == "no-new-data":
        console.print(f"[bold]no new data[/]: {outcome.summary}", highlight=False)
        return
    if outcome.note:
        console.print(outcome.note, highlight=False)
    console.print(
        f"[bold green]registered[/] {outcome.name} version {outcome.version} as staging "
        f"(run {outcome.run_id})\nrows: {outcome.rows_in} in, {outcome.rows_used} used, "
        f"{outcome.rows_quarantined} quarantined"
    )
    console.print(outcome.summary, highlight=False)


@app.command()
def drift(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    source: Annotated[
        str | None, typer.Option(help="The new data: a file or glob (default: the spec's source).")
    ] = None,
    spec: Annotated[
        Path | None, typer.Option(help="The spec to read the data with (default: the one production trained with).")
    ] = None,
    alias: Annotated[str, typer.Option(help="Compare against this alias or version.")] = "production",
    out: Annotated[Path | None, typer.Option(help="Also write report.json and report.md into this folder.")] = None,
) -> None:
    """Print the drift of new data against production (PSI, new categories, schema); trains and records nothing.

    Exits 2 when the data breaks the spec's drift: thresholds, as `train --incremental` would stop.
    """
    from entivec.tasks.lifecycle import drift as drift_checks

    report = _run(lambda: drift_checks.drift_against(name, source, str(spec) if spec else None, alias))
    console.print(report.markdown(), highlight=False, markup=False)
    if out is not None:
        drift_checks.write_report(report, out)
    if not report.passed:
        _fail(f"the data would stop an incremental retrain: {'; '.join(report.breaches)}")


@app.command()
def sweep(
    spec: Annotated[Path, typer.Argument(help="The dataset spec (YAML) to train from.")],
    candidate: Annotated[
        list[str] | None,
        typer.Option("--candidate", "-c", help="A vector size to try (repeat): 'spec', a size rule (fourth_root, "
                     "half_capped, power_056), a multiplier of the spec's sizes (x0.5, x2) or explicit sizes "
                     "(col=4,other=8). Default: spec, the three rules, x0.5 and x2."),
    ] = None,
    dask: Annotated[str | None, typer.Option(help=DASK_HELP)] = None,
    workers: Annotated[int, typer.Option(min=1, help=WORKERS_HELP)] = 2,
) -> None:
    """Train one spec with several vector sizes and compare them (validation loss, downstream); registers nothing."""
    from entivec.flows.parallel import run_flow
    from entivec.flows.sweep import sweep as sweep_flow

    outcome = _run(lambda: run_flow(sweep_flow, dask, workers=workers, spec_path=str(spec), candidates=candidate))
    table = Table(title=f"vector sizes for {outcome.name}")
    for header in outcome.table.columns:
        table.add_column(str(header))
    for row in outcome.table.itertuples(index=False):
        table.add_row(*(f"{v:.6g}" if isinstance(v, float) else str(v) for v in row))
    console.print(table)
    console.print(outcome.summary, highlight=False)
    console.print(f"logged as MLflow run {outcome.run_id} (one nested run per candidate); nothing registered")


@app.command()
def runs(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    limit: Annotated[int, typer.Option(min=1, help="Show at most this many runs, newest first.")] = 20,
    fmt: Annotated[str, typer.Option("--format", help="table, csv or json.")] = "table",
) -> None:
    """Every run of a model, newest first: trains, skips (no new data), drift stops, gates, sweeps."""
    from entivec.tasks.lifecycle.track import run_log

    if fmt not in ("table", "csv", "json"):
        _fail(f"--format must be table, csv or json, not {fmt!r}")
    frame = _run(lambda: run_log(name, limit))
    if fmt == "csv":
        typer.echo(frame.to_csv(index=False), nl=False)
        return
    if fmt == "json":
        typer.echo(frame.to_json(orient="records", indent=2))
        return
    table = Table(title=f"runs of {name} (newest first)")
    for header in ("started", "kind", "status", "version", "data", "note"):
        table.add_column(header, overflow="fold")
    for row in frame.itertuples(index=False):
        table.add_row(row.started.replace("T", " ").removesuffix("+00:00"), row.kind, row.status, row.version,
                      row.data_fingerprint, row.note)
    console.print(table)


@app.command()
def versions(name: Annotated[str, typer.Argument(help="Registered model name.")]) -> None:
    """List the versions of a model: aliases, creation time, data fingerprint and key metrics."""
    from entivec.tasks.lifecycle import registry

    found = _run(lambda: registry.list_versions(name))
    aliases = _run(lambda: registry.aliases_of(name))
    by_version: dict[str, list[str]] = {}
    for alias, version in aliases.items():
        by_version.setdefault(version, []).append(alias)
    table = Table(title=f"versions of {name}")
    headers = ("version", "aliases", "created (UTC)", "data fingerprint", "rows used", "key metrics", "vectors help")
    for header in headers:
        table.add_column(header)
    for mv in found:
        tags = mv.tags
        metrics = ", ".join(
            f"{k.removeprefix('entivec.network_')} {v}" for k, v in sorted(tags.items())
            if k.startswith("entivec.network_")
        )
        created = datetime.fromtimestamp(mv.creation_timestamp / 1000, UTC).strftime("%Y-%m-%d %H:%M:%S")
        table.add_row(
            str(mv.version), ", ".join(sorted(by_version.get(str(mv.version), []))), created,
            tags.get("entivec.data_fingerprint", "")[:12], tags.get("entivec.rows_used", ""),
            metrics, tags.get("entivec.vectors_help", ""),
        )
    console.print(table)


@app.command()
def export(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    version: Annotated[str, typer.Argument(help="Version number or alias (staging, production).")],
    out: Annotated[Path, typer.Option("--out", help="Folder to write the tables into.")],
) -> None:
    """Write each column's vectors as Parquet, CSV and .npy, with its vocabulary, all files or none.

    Tables: id, category, count, is_unknown (and confidence figures when the version has them), then
    <column>__vec0…; manifest.json names the model, version, run, aliases and data they come from.
    """
    from entivec.tasks.apply.export import export_source, export_vector_set
    from entivec.tasks.lifecycle import registry

    loaded = _run(lambda: registry.load_version(name, version))
    source = export_source(name, loaded.version, loaded.run_id, loaded.vector_set, version,
                           _run(lambda: registry.aliases_of(name)))
    written = _run(lambda: export_vector_set(loaded.vector_set, out, source))
    console.print(f"{name} version {loaded.version}: wrote {len(written)} files to {out}")


@app.command()
def demo(
    out: Annotated[Path, typer.Option(help="Folder for the demo's data, spec and exported tables.")] = Path("demo-out"),
    rows: Annotated[int, typer.Option(min=2_000, help="Rows of invented delivery data to generate.")] = 60_000,
) -> None:
    """Generate an invented scenario, train on it end to end, export the vectors and say where to look."""
    import pandas as pd

    from entivec.demo import recovered_structure, write_demo
    from entivec.flows.train import train as train_flow
    from entivec.settings import project_home, tracking_uri
    from entivec.tasks.apply.export import export_source, export_vector_set
    from entivec.tasks.lifecycle import registry

    spec_path = write_demo(out, rows=rows)
    console.print(f"demo data and spec written to {out}/ (spec: {spec_path})")
    outcome = _run(lambda: train_flow(str(spec_path)))
    loaded = registry.load_version(outcome.name, outcome.version)
    export_dir = out / "vectors"
    export_vector_set(loaded.vector_set, export_dir, export_source(
        outcome.name, loaded.version, loaded.run_id, loaded.vector_set, "staging", registry.aliases_of(outcome.name)))
    vs = loaded.vector_set
    depot_rho = recovered_structure(
        vs.vectors["depot"], vs.vocabularies["depot"].categories, pd.read_csv(out / "truth" / "depots.csv"),
        "depot", ["x", "y"],
    )
    family_rho = recovered_structure(
        vs.vectors["product_family"], vs.vocabularies["product_family"].categories,
        pd.read_csv(out / "truth" / "families.csv"), "product_family", ["shelf_life_days"],
    )
    console.print(
        f"rows: {outcome.rows_in} in, {outcome.rows_used} used, {outcome.rows_quarantined} quarantined "
        "(reasons and counts in the run's data/ledger.json and data/quarantine.csv)"
    )
    console.print(outcome.summary, highlight=False)
    console.print(
        f"[bold]hidden structure recovered[/] (Spearman correlation of pairwise distances, vectors vs truth): "
        f"depot map {depot_rho:.2f}, product-family shelf life {family_rho:.2f}"
    )
    console.print(
        f"\n[bold green]registered[/] {outcome.name} version {outcome.version} as staging\n"
        f"  vectors exported to   {export_dir}/\n"
        f"  versions:             entivec versions {outcome.name}\n"
        f"  browse runs & plots:  mlflow ui --backend-store-uri {tracking_uri()}\n"
        f"  project folder:       {project_home()}"
    )


def _register_command_groups() -> None:
    """Commands that live beside the flows they drive register themselves here."""
    import importlib

    for module in ("entivec.cli_lifecycle", "entivec.cli_apply", "entivec.cli_schedule", "entivec.cli_review"):
        importlib.import_module(module).register(app)


_register_command_groups()


def main() -> None:
    from entivec import stopping

    stopping.install()  # SIGTERM / SIGINT end the command cleanly (143 / 130); no temporary server outlives it
    try:
        app()
    except stopping.Stopped as stop:
        errors.print(f"stopped by {stop.signal_name}")
        stopping.finish(stop)
    except KeyboardInterrupt:
        errors.print("interrupted")
        sys.exit(130)


if __name__ == "__main__":
    main()
