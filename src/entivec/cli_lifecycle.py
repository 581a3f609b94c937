"""Lifecycle commands of `entivec`: promote, rollback, history, diff, report (registered by ``entivec.cli``)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.markup import escape
from rich.table import Table
from rich.text import Text

from entivec.cli_output import FORMAT_HELP, Format
from entivec.cli_read import _base

EXIT_REFUSED = 1  # the gate said no: not an input error, but not a success either


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
    from entivec import progress

    progress.note(f"promote {name}: loading (a line follows each finished stage)")
    shown = progress.begin("load libraries")
    from entivec.flows.lifecycle import GateRefused
    from entivec.flows.lifecycle import promote as promote_flow

    shown.end()
    cli = _base()
    cli.start_prefect_server()

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


def _move_text(row) -> str:
    """What an entry did, in words: a refusal reads as a refusal, never as a move."""
    if row.event == "refused":
        stays = f"version {row.from_version}" if row.from_version else "no version"
        return f"refused version {row.to_version or '?'}; {row.alias} stays at {stays}"
    return f"{row.event}: {row.alias} {row.from_version or '–'} → {row.to_version or '–'}"


def history(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    fmt: Annotated[Format, typer.Option("--format", help=FORMAT_HELP)] = Format.table,
    out: Annotated[Path | None, typer.Option("--out", help="Write to this file instead of the terminal.")] = None,
) -> None:
    """Every alias move of a model: when, who, why, from which version to which, the gate's verdict and figures."""
    import pandas as pd

    from entivec.cli_output import figure_value, table, to_csv, to_json
    from entivec.tasks.lifecycle import audit

    cli = _base(reads_registry=True)
    entries = cli._run(lambda: audit.history(name))
    frame = audit.history_frame(entries)
    if fmt is Format.table:
        shown = pd.DataFrame({
            "#": frame["seq"], "when (UTC)": frame["at"].str.replace("T", " ").str.slice(0, 16),
            "what": [_move_text(r) for r in frame.itertuples()], "verdict": frame["verdict"],
            "by": frame["by"].str.slice(0, 12),
            "why": [r.reason + (f" [{r.state}: {r.state_note}]" if r.state != "done" else "")
                    for r in frame.itertuples()],
        })
        rendered = table(shown, title=f"history of {name} ({len(entries)} entries, oldest first)",
                         wrap=("what", "why"), styles={"verdict": {"pass": "green", "fail": "bold red",
                                                                   "forced": "yellow"}})
        if out is None:
            cli.console.print(rendered)
            figures = [(r.seq, r.figures) for r in frame.itertuples() if r.figures]
            for seq, text in figures:
                cli.console.print(f"  #{seq} figures: {text}", soft_wrap=True, highlight=False, markup=False)
            return
        text = frame.to_string(index=False)
    elif fmt is Format.json:
        records = []
        for entry in entries:
            record = entry.to_record()
            details = dict(record.get("details") or {})
            if "figures" in details:  # "+4.10% [+2.95%, +5.20%]" becomes {"value": 0.041, "low": ..., "high": ...}
                details["figures"] = {k: figure_value(v) for k, v in (details["figures"] or {}).items()}
            record["details"] = details
            record["moved"] = entry.moved
            records.append(record)
        text = to_json(records)
    else:  # reasons are typed by people: no live formulas in a spreadsheet (OWASP CSV injection)
        from entivec.tasks.apply.export import spreadsheet_safe

        text = to_csv(spreadsheet_safe(frame))
    if out is None:
        typer.echo(text, nl=not text.endswith("\n"))
    else:
        from entivec.tasks.apply.outputs import write_text_atomically

        cli._run(lambda: write_text_atomically(out, text, "the history"))
        cli.console.print(f"wrote {len(entries)} history entries to {out}")


def _unchanged(result) -> bool:
    """Two versions with the same vectors up to rotation: same categories, same sizes, no drift."""
    if result.older == result.newer:
        return True
    return bool(result.comparisons) and all(
        not comp.added and not comp.dropped and comp.dimension_older == comp.dimension_newer
        and comp.drift == comp.drift and comp.drift < 1e-9 for comp in result.comparisons.values())


def _diff_records(result, unchanged: bool) -> dict:
    a, b = f"v{result.older}", f"v{result.newer}"
    columns = []
    for comp in result.comparisons.values():
        movers = comp.movers.head(20)
        columns.append({
            "column": comp.column, "categories_a": comp.categories_older, "categories_b": comp.categories_newer,
            "added": list(comp.added), "dropped": list(comp.dropped), "dimension_a": comp.dimension_older,
            "dimension_b": comp.dimension_newer, "drift": comp.drift, "neighbours": comp.neighbours,
            "neighbour_overlap": comp.neighbour_overlap, "chance_overlap": comp.chance_overlap,
            "top_movers": [{"category": c, "drift": d} for c, d in zip(movers["category"], movers["drift"],
                                                                         strict=True)],
        })
    metrics = [{"metric": row["metric"], "a": row[a], "b": row[b]} for row in result.metrics.to_dict("records")]
    judged = result.judged.to_dict("records") if result.judged is not None else None
    return {"name": result.name, "a": result.older, "b": result.newer, "no_change": unchanged,
            "same_rows": judged, "columns": columns, "train_run_metrics": metrics, "notes": list(result.notes)}


def diff(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    a: Annotated[str, typer.Argument(help="The reference version or alias (e.g. production).")],
    b: Annotated[str, typer.Argument(help="The version or alias compared with it (e.g. staging).")],
    html: Annotated[Path | None, typer.Option("--html", help="Also write a self-contained HTML report here.")] = None,
    spec: Annotated[
        Path | None, typer.Option("--spec", help="Judge both on the same held-out rows of this spec's data.")
    ] = None,
    neighbours: Annotated[int, typer.Option(min=1, max=100, help="k of the neighbour overlap.")] = 10,
    fmt: Annotated[Format, typer.Option("--format", help=FORMAT_HELP)] = Format.table,
) -> None:
    """Compare two versions: vocabulary changes, aligned drift, neighbour overlap, top movers, downstream metrics.

    Headers follow the arguments: A first, then B (B aligned onto A). With --spec, the comparison of both on the
    same held-out rows comes first: it is the fair one.
    """
    import pandas as pd

    from entivec.cli_output import emit, table, to_json
    from entivec.tasks.lifecycle.versiondiff import diff_versions

    cli = _base(reads_registry=True)
    result = cli._run(lambda: diff_versions(name, a, b, spec_path=str(spec) if spec else None,
                                            neighbours=neighbours))
    unchanged = _unchanged(result)
    if fmt is Format.json:
        typer.echo(to_json(_diff_records(result, unchanged)))
    elif fmt is Format.csv:
        emit(pd.DataFrame([{k: v for k, v in c.items() if k != "top_movers"}
                           for c in _diff_records(result, unchanged)["columns"]]), fmt, cli.console)
    else:
        _print_diff(cli, result, unchanged, a, b, table)
    if html is not None:
        from entivec.tasks.present.report import write_diff_html  # plotting, only for the page

        path = cli._run(lambda: write_diff_html(result, html))
        cli.console.print(f"HTML report written to {path}")


def _print_diff(cli, result, unchanged: bool, a: str, b: str, table) -> None:
    import pandas as pd

    va, vb = f"version {result.older}", f"version {result.newer}"
    cli.console.print(f"[bold]{escape(result.name)}: A = {escape(a)} ({va}), B = {escape(b)} ({vb})[/]",
                      soft_wrap=True, highlight=False)
    if unchanged:
        same = "the same version" if result.older == result.newer else "the same vectors (up to rotation)"
        cli.console.print(f"[bold]no change[/]: A and B are {same}; no category added or dropped, no drift",
                          soft_wrap=True, highlight=False)
    if result.judged is not None:  # the fair comparison first: both on the same held-out rows
        shown = [c for c in result.judged.columns if c not in ("model", "mse", "mean_loss")]
        cli.console.print(table(_rounded(result.judged[shown]), title="A and B judged on the same held-out rows"))
    if not unchanged:
        rows = pd.DataFrame([{
            "column": comp.column, "categories": f"{comp.categories_older} → {comp.categories_newer}",
            "new/gone": f"{len(comp.added)}/{len(comp.dropped)}",
            "dims": f"{comp.dimension_older} → {comp.dimension_newer}",
            "drift": "" if comp.drift != comp.drift else f"{comp.drift:.3f}",
            "overlap (chance)": "" if comp.neighbour_overlap != comp.neighbour_overlap else
            f"{comp.neighbour_overlap:.2f} ({comp.chance_overlap:.2f})",
        } for comp in result.comparisons.values()])
        cli.console.print(table(rows, title="per column, A → B (B aligned onto A; new in B / gone from A)",
                                wrap=("column",)))
        for comp in result.comparisons.values():
            # Movers beyond their own noise first (the order compare_vector_sets gives); categories seen too rarely
            # to have a well-measured vector are listed apart, so they do not crowd out the real movers.
            common = comp.movers[~comp.movers["rare"]].head(8)
            top = ", ".join(
                f"{c} {d:.2f}" + (f" ({m})" if comp.noise_measured else "")
                for c, d, m in zip(common["category"], common["drift"], common["moved"], strict=True) if d == d
            )
            rare = comp.rare_movers().head(5)
            lines = [f"[bold]{escape(comp.column)}[/] top movers: {escape(top) or 'none'}"]
            if len(rare):
                lines.append("    rare categories (few rows, noisy vectors): " + escape(", ".join(
                    f"{c} {d:.2f} (n={n})" for c, d, n in zip(rare["category"], rare["drift"], rare["count_newer"],
                                                              strict=True) if d == d)))
            for label, values in (("added in B", comp.added), ("dropped from A", comp.dropped)):
                if values:
                    more = " …" if len(values) > 20 else ""
                    lines.append(f"    {label}: {escape(', '.join(values[:20]))}{more}")
            for line in lines:
                cli.console.print(line, soft_wrap=True, highlight=False)
    if result.metrics.empty:
        cli.console.print("(the train runs of these versions recorded no downstream metrics)", style="dim")
    else:
        metrics = result.metrics.rename(columns={f"v{result.older}": f"A (v{result.older})",
                                                 f"v{result.newer}": f"B (v{result.newer})"})
        if result.older == result.newer:
            metrics = result.metrics.rename(columns={f"v{result.older}": f"A = B (v{result.older})"})
        cli.console.print(table(_rounded(metrics), title="train-run metrics (each on its own held-out rows)",
                                wrap=("metric",)))
    for note in result.notes:
        cli.console.print(note, highlight=False, style="dim", soft_wrap=True)


def _rounded(frame):
    shown = frame.copy()
    for column in shown.columns:
        if shown[column].dtype.kind == "f":
            shown[column] = shown[column].map(lambda v: "" if v != v else f"{v:.6g}")
    return shown


def report(
    name: Annotated[str, typer.Argument(help="Registered model name.")],
    version: Annotated[str, typer.Argument(help="Version number or alias.")] = "production",
    out: Annotated[Path | None, typer.Option("--out", help="Where to write the HTML file.")] = None,
) -> None:
    """Write a version's HTML report (train run plots, gate evidence, alias moves) and log it to MLflow."""
    from entivec.tasks.present import report as reports

    cli = _base(reads_registry=True)
    # A plain call, not a flow: reading a finished version needs no Prefect server.
    published = cli._run(lambda: reports.publish_version_report(name, version, str(out) if out else None))
    cli.console.print(f"report written to {published.path}\nlogged to MLflow: {published.artifact_uri}",
                      soft_wrap=True)


def register(app: typer.Typer) -> None:
    """Add the lifecycle commands to the `entivec` application."""
    app.command()(promote)
    app.command()(rollback)
    app.command()(history)
    app.command()(diff)
    app.command()(report)
