"""Lifecycle commands of `entivec`: promote, rollback, history, diff, report (registered by ``entivec.cli``)."""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer
from rich.markup import escape
from rich.table import Table
from rich.text import Text

EXIT_REFUSED = 1  # the gate said no: not an input error, but not a success either


class HistoryFormat(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"


def _base():
    # Imported when a command runs: entivec.cli imports this module while it is itself being imported.
    from entivec import cli

    return cli


def _checks_table(frame, title: str) -> Table:
    table = Table(title=title, show_lines=False)
    for column in ("group", "check", "verdict", "figures"):
        table.add_column(column, overflow="fold")
    style = {"pass": "green", "FAIL": "bold red", "info": "dim"}
    for row in frame.itertuples(index=False):
        # Data cells as plain Text: category names and figures may hold brackets that are not markup.
        table.add_row(Text(row.group), Text(row.check), Text(row.verdict, style=style[row.verdict]), Text(row.figures))
    return table


def promote(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    reason: Annotated[str, typer.Option("--reason", help="Why this promotion; kept in the history.")],
    version: Annotated[
        str | None, typer.Option("--version", help="Candidate version number or alias (default: staging).")
    ] = None,
    spec: Annotated[
        Path | None,
        typer.Option("--spec", help="Spec whose newest data the gate judges on (default: the candidate's own)."),
    ] = None,
    by: Annotated[str | None, typer.Option("--by", help="Who promotes (default: the OS user).")] = None,
    force: Annotated[
        bool, typer.Option("--force", help="Promote even if the gate fails; recorded as forced.")
    ] = False,
    source: Annotated[
        str | None,
        typer.Option(
            "--source",
            help="Data file or glob the gate judges on (default: the drop the candidate was trained from with "
            "`train --source`, else the spec's own source).",
        ),
    ] = None,
) -> None:
    """Judge a candidate against the baseline and production by the spec's gate; on a pass make it production."""
    from entivec.flows.lifecycle import GateRefused
    from entivec.flows.lifecycle import promote as promote_flow

    cli = _base()

    def run():
        state = promote_flow(
            name, reason, version=version, spec_path=str(spec) if spec else None, by=by, force=force,
            source=source, return_state=True,
        )
        result = state.result(raise_on_failure=False)
        if isinstance(result, BaseException) and not isinstance(result, GateRefused):
            raise result  # mapped to a message and an exit code like any other error
        return result

    outcome = cli._run(run)
    if isinstance(outcome, GateRefused):
        result = outcome.outcome
        cli.console.print(_checks_table(result.checks, f"gate of {name} version {result.candidate}: FAILED"))
        cli.console.print(f"evidence run {result.evidence_run}; report {result.report_path}", highlight=False,
                          soft_wrap=True)
        cli._fail(str(outcome), EXIT_REFUSED)
    title = f"gate of {name} version {outcome.candidate}: {'FORCED' if outcome.forced else 'PASSED'}"
    cli.console.print(_checks_table(outcome.checks, title))
    was = f"version {outcome.previous_production}" if outcome.previous_production else "no version"
    cli.console.print(
        f"[bold green]production[/] of {name} is now version {outcome.candidate} (was {was})"
        + (" [bold yellow]by force: the gate failed[/]" if outcome.forced else "")
        + f"\nevidence run {outcome.evidence_run}; report {outcome.report_path}",
        highlight=False,
        soft_wrap=True,
    )


def rollback(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    reason: Annotated[str, typer.Option("--reason", help="Why roll back; kept in the history.")],
    by: Annotated[str | None, typer.Option("--by", help="Who rolls back (default: the OS user).")] = None,
) -> None:
    """Point production back to the version it held before, in one step."""
    from entivec.flows.lifecycle import rollback as rollback_flow

    cli = _base()
    outcome = cli._run(lambda: rollback_flow(name, reason, by=by))
    cli.console.print(
        f"[bold green]production[/] of {name} is back at version {outcome.restored} (was version {outcome.replaced})",
        soft_wrap=True,
    )


def history(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    fmt: Annotated[HistoryFormat, typer.Option("--format", help="table, csv or json.")] = HistoryFormat.table,
    out: Annotated[Path | None, typer.Option("--out", help="Write to this file instead of the terminal.")] = None,
) -> None:
    """Every alias move of a model: when, who, why, from which version to which, the gate's verdict and figures."""
    from entivec.tasks.lifecycle import audit

    cli = _base()
    entries = cli._run(lambda: audit.history(name))
    frame = audit.history_frame(entries)
    if fmt is HistoryFormat.table and out is None:
        # One block per entry rather than a wide table: it stays readable in a narrow terminal.
        cli.console.print(f"[bold]history of {name}[/] ({len(entries)} entries, oldest first)", soft_wrap=True)
        colour = {"pass": "green", "fail": "red", "forced": "yellow"}
        for row in frame.itertuples(index=False):
            when = row.at.replace("T", " ").removesuffix("+00:00")
            verdict = f"[{colour.get(row.verdict, 'default')}]{row.verdict}[/]"
            state = "" if row.state == "done" else f"  [yellow]({row.state}: {escape(row.state_note)})[/]"
            cli.console.print(
                f"[bold]#{row.seq}[/] {when}  [bold]{row.event}[/]  {row.alias}: "
                f"{row.from_version or '–'} → {row.to_version or '–'}  by {escape(row.by)}  verdict {verdict}{state}",
                soft_wrap=True, highlight=False,
            )
            for label, value in (("reason", row.reason), ("figures", row.figures),
                                 ("data", row.data_fingerprint), ("evidence", row.evidence_run)):
                if value:
                    cli.console.print(f"    {label}: {value}", soft_wrap=True, highlight=False, markup=False)
        return
    if fmt is HistoryFormat.json:
        text = audit.history_json(entries)
    elif fmt is HistoryFormat.csv:  # reasons are typed by people: no live formulas in a spreadsheet (OWASP)
        from entivec.tasks.apply.export import spreadsheet_safe

        text = spreadsheet_safe(frame).to_csv(index=False)
    else:
        text = frame.to_string(index=False)
    if out is None:
        typer.echo(text, nl=not text.endswith("\n"))
    else:
        from entivec.tasks.apply.outputs import write_text_atomically

        cli._run(lambda: write_text_atomically(out, text, "the history"))
        cli.console.print(f"wrote {len(entries)} history entries to {out}")


def diff(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    a: Annotated[str, typer.Argument(help="The reference version or alias (e.g. production).")],
    b: Annotated[str, typer.Argument(help="The version or alias compared with it (e.g. staging).")],
    html: Annotated[Path | None, typer.Option("--html", help="Also write a self-contained HTML report here.")] = None,
    spec: Annotated[
        Path | None, typer.Option("--spec", help="Judge both on the same held-out rows of this spec's data.")
    ] = None,
    neighbours: Annotated[int, typer.Option(min=1, max=100, help="k of the neighbour overlap.")] = 10,
) -> None:
    """Compare two versions: vocabulary changes, aligned drift, neighbour overlap, top movers, downstream metrics."""
    from entivec.flows.lifecycle import diff_versions, write_diff_html

    cli = _base()
    result = cli._run(lambda: diff_versions(name, a, b, spec_path=str(spec) if spec else None,
                                            neighbours=neighbours))
    cli.console.print(f"[bold]{name}: version {result.older} → version {result.newer}[/] "
                      "(newer aligned onto older by orthogonal Procrustes on the shared categories)", soft_wrap=True)
    table = Table(title="per column")
    for column in ("column", "categories", "added", "dropped", "dims", "drift", "overlap (chance)"):
        table.add_column(column, no_wrap=column != "column")
    for comp in result.comparisons.values():
        table.add_row(
            Text(comp.column), f"{comp.categories_older} → {comp.categories_newer}", str(len(comp.added)),
            str(len(comp.dropped)), f"{comp.dimension_older} → {comp.dimension_newer}", f"{comp.drift:.3f}",
            f"{comp.neighbour_overlap:.2f} ({comp.chance_overlap:.2f}, k={comp.neighbours})",
        )
    cli.console.print(table)
    for comp in result.comparisons.values():
        top = ", ".join(f"{c} {d:.2f}" for c, d in zip(comp.movers["category"].head(8), comp.movers["drift"].head(8),
                                                        strict=True) if d == d)
        lines = [f"[bold]{escape(comp.column)}[/] top movers: {escape(top) or 'none'}"]
        if comp.added:
            lines.append(f"    added: {escape(', '.join(comp.added[:20]))}{' …' if len(comp.added) > 20 else ''}")
        if comp.dropped:
            lines.append(f"    dropped: {escape(', '.join(comp.dropped[:20]))}{' …' if len(comp.dropped) > 20 else ''}")
        for line in lines:
            cli.console.print(line, soft_wrap=True, highlight=False)
    if result.metrics.empty:
        cli.console.print("(the train runs of these versions recorded no downstream metrics)", style="dim")
    metrics = Table(title="downstream metrics of the train runs, side by side")
    for column in result.metrics.columns:
        metrics.add_column(str(column))
    for row in result.metrics.itertuples(index=False):
        metrics.add_row(*[f"{v:.6g}" if isinstance(v, float) else str(v) for v in row])
    if not result.metrics.empty:
        cli.console.print(metrics)
    if result.judged is not None:
        judged = Table(title="both judged on the same held-out rows")
        shown = [c for c in result.judged.columns if c not in ("model", "mse", "mean_loss")]
        for column in shown:
            judged.add_column(str(column))
        for row in result.judged[shown].itertuples(index=False):
            judged.add_row(*[f"{v:.6g}" if isinstance(v, float) else str(v) for v in row])
        cli.console.print(judged)
    for note in result.notes:
        cli.console.print(note, highlight=False, style="dim", soft_wrap=True)
    if html is not None:
        path = cli._run(lambda: write_diff_html(result, html))
        cli.console.print(f"HTML report written to {path}")


def report(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    version: Annotated[str, typer.Argument(help="Version number or alias.")] = "production",
    out: Annotated[Path | None, typer.Option("--out", help="Where to write the HTML file.")] = None,
) -> None:
    """Write a version's HTML report (train run plots, gate evidence, alias moves) and log it to MLflow."""
    from entivec.flows.lifecycle import version_report

    cli = _base()
    published = cli._run(lambda: version_report(name, version, str(out) if out else None))
    cli.console.print(f"report written to {published.path}\nlogged to MLflow: {published.artifact_uri}",
                      soft_wrap=True)


def register(app: typer.Typer) -> None:
    """Add the lifecycle commands to the `entivec` application."""
    app.command()(promote)
    app.command()(rollback)
    app.command()(history)
    app.command()(diff)
    app.command()(report)
