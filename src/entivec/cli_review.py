"""The `entivec review` command: a version's review page as one self-contained HTML file (see ``entivec.cli``)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer


def review(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    version: Annotated[str, typer.Argument(help="Version number or alias.")] = "staging",
    out: Annotated[Path | None, typer.Option("--out", help="Where to write the HTML file.")] = None,
) -> None:
    """Write a version's review page (nearest neighbours, maps, new and dropped categories, the gate's figures)
    as one HTML file that opens without a server, and log it to the version's train run."""
    from entivec import cli
    from entivec.tasks.present.review import publish_review_page

    published = cli._run(lambda: publish_review_page(name, version, out))
    cli.console.print(f"review page written to {published.path}\nlogged to MLflow: {published.artifact_uri}",
                      soft_wrap=True)


def register(app: typer.Typer) -> None:
    """Add the review command to the `entivec` application."""
    app.command()(review)
