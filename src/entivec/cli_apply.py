"""The `entivec apply` command: a thin layer over the apply flow."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

UNKNOWN_HELP = (
    "What a category outside the vocabulary (unseen, too rare, or missing) gets: unknown_row (the trained "
    "unknown vector), zeros, mean (count-weighted mean of the known vectors) or error (refuse the input)."
)


def register(app: typer.Typer) -> None:
    """Add the `apply` command to the entivec CLI."""

    @app.command()
    def apply(
        name: Annotated[str, typer.Argument(help="Registered model name.")],
        input_path: Annotated[
            str,
            typer.Option(
                "--input",
                help="CSV (.csv, .tsv, optionally .gz) or Parquet table: one file, a glob ('drops/*.csv', quoted) "
                "or a folder (every data file below it; key=value folder names become columns).",
            ),
        ],
        output_path: Annotated[
            Path, typer.Option("--output", help="Parquet file to write (replaced only on success).")
        ],
        alias: Annotated[
            str | None, typer.Option(help="Alias of the version to use (default: production).")
        ] = None,
        version: Annotated[int | None, typer.Option(help="Version number to use instead of an alias.")] = None,
        columns: Annotated[
            str | None, typer.Option(help="Comma-separated category columns (default: all of the vector set's).")
        ] = None,
        unknown: Annotated[str, typer.Option(help=UNKNOWN_HELP)] = "unknown_row",
        chunk_rows: Annotated[
            int, typer.Option(min=1, help="Rows read, looked up and written at a time; bounds the memory used.")
        ] = 1_000_000,
        progress: Annotated[bool, typer.Option(help="Show a progress bar.")] = True,
        max_unknown_share: Annotated[
            float | None,
            typer.Option(
                min=0.0, max=1.0,
                help="Fail (exit 2, nothing written) when any column's share of unknown rows (unseen, too rare "
                "or missing) is above this, e.g. 0.05.",
            ),
        ] = None,
    ) -> None:
        """Append a registered version's vectors to every row of a table and write it as Parquet.

        The output's Parquet metadata records the model name, version, run id, aliases, data fingerprint, the
        unknown-category rule and the time; input columns keep their types; a failure leaves no output file
        behind.
        """
        from rich.table import Table

        from entivec.cli import _fail, _run, console
        from entivec.flows.apply import apply as apply_flow
        from entivec.tasks.apply.lookup import UNKNOWN_RULES

        if alias is not None and version is not None:
            _fail("give either --alias or --version, not both")
        if unknown not in UNKNOWN_RULES:
            _fail(f"--unknown must be one of {', '.join(UNKNOWN_RULES)}, got {unknown!r}")
        chosen = [c.strip() for c in columns.split(",") if c.strip()] if columns else None
        which = str(version) if version is not None else (alias or "production")
        result = _run(
            lambda: apply_flow(
                name, input_path, str(output_path), version=which, columns=chosen, unknown=unknown,
                chunk_rows=chunk_rows, show_progress=progress, max_unknown_share=max_unknown_share,
            )
        )
        table = Table(title=f"{name} version {result.version} -> {result.output_path}")
        for header in ("column", "rows", "unknown", "missing", "unseen", "unknown share", "most frequent unseen"):
            table.add_column(header)
        for row in result.report_rows():
            top = ", ".join(f"{c} ({n})" for c, n in row["top_unseen"])
            table.add_row(
                row["column"], f"{row['rows']:,}", f"{row['unknown']:,}", f"{row['missing']:,}",
                f"{row['unseen']:,}", f"{100 * row['unknown_share']:.2f}%", top,
            )
        console.print(table)
        console.print(
            f"wrote {result.rows:,} rows in {result.chunks} chunk(s) to {result.output_path} "
            f"(version {result.version}, run {result.run_id}, unknown rule {result.unknown})"
        )
