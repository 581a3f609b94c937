"""Commands of `entivec` that only read: versions, runs, export, check (registered by ``entivec.cli``).

None of them runs a flow, so none starts a Prefect server; each imports what it reads with and nothing more.
"""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer

from entivec.cli_output import FORMAT_HELP, Format

VERDICT_STYLES = {"pass": "green", "fail": "bold red", "forced": "yellow", "FAILED": "bold red"}


def _base(reads_registry: bool = False):
    """The application module, imported when a command runs (``entivec.cli`` imports the command modules while
    it is itself being imported). A command that only reads the registry reads a SQLite store directly."""
    from entivec import cli

    if reads_registry:
        from entivec.tasks.lifecycle.store import read_directly

        read_directly()
    return cli


def versions(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    fmt: Annotated[Format, typer.Option("--format", help=FORMAT_HELP)] = Format.table,
) -> None:
    """List the versions of a model: aliases, creation time, data fingerprint and key metrics."""
    import pandas as pd

    from entivec.cli_output import emit, plain
    from entivec.tasks.lifecycle import registry

    cli = _base(reads_registry=True)
    found = cli._run(lambda: registry.list_versions(name))
    aliases = cli._run(lambda: registry.aliases_of(name))
    by_version: dict[str, list[str]] = {}
    for alias, version in aliases.items():
        by_version.setdefault(str(version), []).append(alias)
    records, rows = [], []
    for mv in found:
        tags = mv.tags
        metrics = {k.removeprefix("entivec.network_"): _number(v) for k, v in sorted(tags.items())
                   if k.startswith("entivec.network_")}
        created = datetime.fromtimestamp(mv.creation_timestamp / 1000, UTC)
        helps = tags.get("entivec.vectors_help", "")
        record = {
            "version": int(mv.version), "aliases": sorted(by_version.get(str(mv.version), [])),
            "created": created.isoformat(timespec="seconds"),
            "data_fingerprint": tags.get("entivec.data_fingerprint", ""),
            "rows_used": _number(tags.get("entivec.rows_used", "")),
            "vectors_help": {"true": True, "false": False}.get(helps),
            "network_metrics": metrics,
            # A registration that never finished: refused by export, apply and promote until a lifecycle
            # command (e.g. `entivec history NAME`) removes or completes it.
            "state": "incomplete" if registry.is_incomplete(mv) else "complete",
        }
        records.append(record)
        rows.append({**{k: v for k, v in record.items() if k != "network_metrics"},
                     **{f"network_{k}": v for k, v in metrics.items()}})
    if fmt is not Format.table:
        frame = pd.DataFrame(rows)
        emit(frame, fmt, cli.console, records=records)
        return
    shown = pd.DataFrame({
        "version": [r["version"] for r in records],
        "aliases": [r["aliases"] for r in records],
        "created (UTC)": [r["created"][:16].replace("T", " ") for r in records],
        "data": [r["data_fingerprint"][:8] for r in records],
        "rows used": [f"{r['rows_used']:,}" if isinstance(r["rows_used"], int | float) else "" for r in records],
        "helps": [{True: "yes", False: "no", None: ""}[r["vectors_help"]] for r in records],
        "state": ["(incomplete)" if r["state"] == "incomplete" else "" for r in records],
        "network metrics": [[f"{k} {plain(v):.4g}" if isinstance(v, float) else f"{k} {v}"
                             for k, v in r["network_metrics"].items()] for r in records],
    })
    if not (shown["state"] != "").any():  # the column only when a version needs it: room for the metrics at 80
        shown = shown.drop(columns="state")
    emit(shown, fmt, cli.console, title=f"versions of {name}", wrap=("network metrics",),
         right=("version", "rows used"))


def _number(text: str):
    try:
        value = float(text)
    except (TypeError, ValueError):
        return text
    return int(value) if value.is_integer() and "." not in str(text) and "e" not in str(text).lower() else value


def runs(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    limit: Annotated[int, typer.Option(min=1, help="Show at most this many runs, newest first.")] = 20,
    fmt: Annotated[Format, typer.Option("--format", help=FORMAT_HELP)] = Format.table,
) -> None:
    """Every run of a model, newest first: trains, skips (no new data), drift stops, gates, sweeps."""
    from entivec.cli_output import emit, strip_markdown
    from entivec.tasks.lifecycle.runlog import run_log

    cli = _base(reads_registry=True)
    frame = cli._run(lambda: run_log(name, limit))
    frame["note"] = frame["note"].map(strip_markdown)
    if fmt is not Format.table:
        emit(frame, fmt, cli.console)
        return
    shown = frame.assign(started=frame["started"].str.replace("T", " ").str.slice(0, 16))
    columns = ["started", "kind", "status", "version"] + (["verdict"] if "verdict" in frame else []) + ["note"]
    emit(shown[columns], fmt, cli.console, title=f"runs of {name} (newest first)", wrap=("note",),
         styles={"verdict": VERDICT_STYLES})


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

    cli = _base(reads_registry=True)
    loaded = cli._run(lambda: registry.load_version(name, version))
    source = export_source(name, loaded.version, loaded.run_id, loaded.vector_set, version,
                           cli._run(lambda: registry.aliases_of(name)))
    written = cli._run(lambda: export_vector_set(loaded.vector_set, out, source))
    cli.console.print(f"{name} version {loaded.version}: wrote {len(written)} files to {out}", soft_wrap=True)


def check(spec: Annotated[Path, typer.Argument(help="The dataset spec (YAML) to check.")]) -> None:
    """Check a spec and the header of each data file it names, without reading the rows or training.

    Exits 2 naming the file, column or key of the first problem found.
    """
    from entivec.tasks.ingest import read

    cli = _base()

    def headers():
        from entivec.schemas.spec import load_spec, resolve_source

        loaded = load_spec(spec)
        read.check_spec_fits(loaded, spec)
        pattern = resolve_source(loaded, spec)
        # The same steps read_source takes before it reads any row: files, formats, headers, columns.
        paths = read._match_files(pattern)
        found = []
        for path in paths:
            fmt = read._file_format(path, loaded.source.format)
            columns = read._read_header(path, fmt, loaded)
            read._check_columns(path, columns, loaded, fmt)
            found.append((path, fmt, columns))
        first = set(found[0][2])
        for path, _, columns in found[1:]:
            if set(columns) != first:
                raise read.InputError(f"{path}: its columns differ from those of {found[0][0]} (source {pattern})")
        return loaded, found

    loaded, found = cli._run(headers)
    cli.console.print(f"spec {spec}: model {loaded.name}, {len(loaded.embed_names)} embedded column(s), "
                      f"target {loaded.target.column} ({loaded.target.task})", highlight=False, soft_wrap=True)
    for path, fmt, columns in found:
        cli.console.print(f"  {path}: {fmt}, {len(columns)} columns, every column the spec names is there",
                          highlight=False, soft_wrap=True)
    cli.console.print("[bold green]ok[/]: nothing read beyond the header; rows are checked when you train")


def register(app: typer.Typer) -> None:
    """Add the read commands to the `entivec` application."""
    app.command()(versions)
    app.command()(runs)
    app.command()(export)
    app.command()(check)
