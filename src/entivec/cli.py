"""The `entivec` command: a thin layer over the flows, with plain messages and non-zero exits on failure."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape

from entivec.cli_output import FORMAT_HELP, Format

app = typer.Typer(
    name="entivec",
    help="Retrain, judge, version and apply entity embeddings (vectors) of high-cardinality categories.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
console = Console()
errors = Console(stderr=True)

EXIT_INPUT = 2  # bad spec, bad data, unknown name/version, drift stop, unseen category: the user can fix it
EXIT_FAILED = 1  # anything else

# The errors a user can fix, by where they are defined: matched by name so that a read command need not import
# the modules (and torch, Prefect) that define them.
USER_ERRORS = frozenset({
    "entivec.schemas.spec.SpecError",
    "entivec.settings.SettingsError",
    "entivec.tasks.ingest.common.InputError",  # DriftStop and the apply job's input errors are InputErrors
    "entivec.tasks.lifecycle.store.RegistryError",  # LifecycleError (rollback with nothing to go back to)
    "entivec.schemas.ledger.LedgerMismatch",
    "entivec.tasks.apply.lookup.UnknownCategoryError",
    "entivec.tasks.apply.lookup.CategoryTypeError",
    "entivec.tasks.apply.outputs.OutputError",  # disk full, no permission: the output folder is left as it was
})


@app.callback()
def _options(
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print only results and errors.")] = False,
    verbose: Annotated[
        bool, typer.Option("--verbose", "-v", help="Also show Prefect's, Dask's and MLflow's own logs.")
    ] = False,
    debug: Annotated[bool, typer.Option("--debug", help="Like --verbose, and show the traceback of an error.")] = False,
) -> None:
    """Retrain, judge, version and apply entity embeddings (vectors) of high-cardinality categories."""
    from entivec.cli_output import configure
    from entivec.tasks.lifecycle.store import read_directly

    read_directly(False)  # each command decides: the read-only ones turn direct reads of a SQLite store on
    if quiet and (verbose or debug):
        _fail("--quiet cannot be combined with --verbose or --debug")
    configure(quiet=quiet, verbose=verbose, debug=debug)


def _fail(message: str, code: int = EXIT_INPUT) -> None:
    errors.print(f"[bold red]error:[/] {escape(message)}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


def is_user_error(exc: BaseException) -> bool:
    return any(f"{c.__module__}.{c.__qualname__}" in USER_ERRORS for c in type(exc).__mro__)


def _run(call):
    """Run a flow or a read, turning the errors a user can fix into one clear message and exit code 2."""
    from entivec.cli_output import debugging

    try:
        return call()
    except typer.Exit:
        raise
    except Exception as exc:  # noqa: BLE001 - the last line of defence prints, never a bare traceback
        if debugging():
            import traceback

            traceback.print_exception(exc, file=sys.stderr)
        cause = exc
        while not is_user_error(cause) and (cause.__cause__ or cause.__context__) is not None:
            cause = cause.__cause__ or cause.__context__
        if is_user_error(cause):
            _fail(str(cause))
        _fail(f"{type(exc).__name__}: {exc}" + ("" if debugging() else " (run with --debug for the traceback)"),
              EXIT_FAILED)


def _check_spec_first(spec: Path) -> None:
    """A spec mistake reported in a second, before the flow's imports and its Prefect server take their time."""
    from entivec.schemas.spec import load_spec

    _run(lambda: load_spec(spec))


def start_prefect_server() -> None:
    """Start the temporary Prefect server now, as its own stage line, when no server is configured.

    The flow would start the same one (Prefect keeps one per process and stops it at exit) at its first call,
    silently; here the user sees what the wait is for.
    """
    from prefect.settings import PREFECT_API_URL, PREFECT_SERVER_EPHEMERAL_ENABLED

    if PREFECT_API_URL.value() or not PREFECT_SERVER_EPHEMERAL_ENABLED.value():
        return
    from prefect.server.api.server import SubprocessASGIServer

    from entivec import progress

    shown = progress.begin("start Prefect server")
    _run(lambda: SubprocessASGIServer().start())
    shown.end(note="temporary, stopped when the command ends; set PREFECT_API_URL to use a shared one")


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
    from entivec import progress

    progress.note(f"train {spec}: loading (a line follows each finished stage)")
    _check_spec_first(spec)
    shown = progress.begin("load libraries")
    from entivec.flows.parallel import run_flow
    from entivec.flows.train import train as train_flow

    shown.end()
    start_prefect_server()

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
    for line in outcome.data_path:
        console.print(f"  {line}", highlight=False)
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
    fmt: Annotated[Format, typer.Option("--format", help=FORMAT_HELP)] = Format.table,
) -> None:
    """Train one spec with several vector sizes and compare them (validation loss, downstream); registers nothing."""
    from entivec import progress

    progress.note(f"sweep {spec}: loading (a line follows each finished stage and candidate)")
    _check_spec_first(spec)
    shown = progress.begin("load libraries")
    from entivec.cli_output import emit, table
    from entivec.flows.parallel import run_flow
    from entivec.flows.sweep import sweep as sweep_flow

    shown.end()
    start_prefect_server()

    outcome = _run(lambda: run_flow(sweep_flow, dask, workers=workers, spec_path=str(spec), candidates=candidate))
    frame = outcome.table
    if fmt is Format.table:
        shown = frame.copy()
        for column in shown.columns:
            if shown[column].dtype.kind == "f":
                shown[column] = shown[column].map(lambda v: "" if v != v else f"{v:.4g}")
        # Long metric names broken at their underscores, so headers wrap instead of being cut.
        shown.columns = [str(c).replace("_", " ") for c in shown.columns]
        console.print(table(shown, title=f"vector sizes for {outcome.name}", wrap=tuple(shown.columns)))
        console.print(outcome.summary, highlight=False)
        console.print(f"logged as MLflow run {outcome.run_id} (one nested run per candidate); nothing registered")
    else:
        emit(frame, fmt, console)


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

    for module in ("entivec.cli_read", "entivec.cli_lifecycle", "entivec.cli_apply", "entivec.cli_schedule",
                   "entivec.cli_review"):
        importlib.import_module(module).register(app)


_register_command_groups()


def main() -> None:
    from entivec.settings import apply_environment_defaults

    # The command, not `import entivec`, applies the settings: before anything imports Prefect or MLflow.
    apply_environment_defaults()
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
