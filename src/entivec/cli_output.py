"""How `entivec` talks: the output level (quiet, normal, verbose, debug), the libraries' own logs, and one way to
print a table for people (fits 80 columns), as CSV or as JSON (numbers as numbers) for scripts."""

from __future__ import annotations

import json
import logging
import math
import os
import re
import sys
import warnings
from enum import StrEnum
from typing import Any

from rich import box
from rich.console import Console
from rich.table import Table
from rich.text import Text


class Format(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"


FORMAT_HELP = "table (for people), csv or json (for scripts; numbers as numbers)."

_state = {"level": "normal"}

# Loggers of the libraries underneath; their messages are for whoever debugs entivec, not for its users.
LIBRARY_LOGGERS = ("prefect", "distributed", "dask", "mlflow", "alembic", "httpx", "urllib3", "uvicorn",
                   "fastapi", "asyncio", "git")


def level() -> str:
    return _state["level"]


def debugging() -> bool:
    return _state["level"] == "debug"


def configure(*, quiet: bool = False, verbose: bool = False, debug: bool = False) -> str:
    """Apply the settings and the output level for one command; returns the level in force.

    quiet: nothing but results and errors; normal: stage lines, bars and a summary, the libraries silent;
    verbose: also Prefect's, Dask's and MLflow's own logs; debug: verbose plus the full traceback of an error.
    """
    from entivec import progress
    from entivec.settings import apply_environment_defaults

    apply_environment_defaults()
    chosen = "debug" if debug else "verbose" if verbose else "quiet" if quiet else "normal"
    _state["level"] = chosen
    progress.set_level({"debug": "verbose"}.get(chosen, chosen))
    loud = chosen in ("verbose", "debug")
    # Read by Prefect when it is first imported (here or in a Dask worker process) ...
    os.environ["PREFECT_LOGGING_LEVEL"] = "DEBUG" if chosen == "debug" else "INFO" if loud else "WARNING"
    # Prefect's console handler takes every record that reaches the root logger, including the tracebacks its
    # engine logs for a failed flow or task; entivec prints its own one-line message instead.
    os.environ["PREFECT_LOGGING_HANDLERS_CONSOLE_LEVEL"] = "NOTSET" if loud else "CRITICAL"
    os.environ["DASK_DISTRIBUTED__LOGGING__DISTRIBUTED"] = "info" if loud else "error"
    os.environ["MLFLOW_LOGGING_LEVEL"] = "DEBUG" if chosen == "debug" else "INFO" if loud else "WARNING"
    # ... and set on the live objects when Prefect was imported before (a test runner, a notebook).
    _quiet_live_loggers(loud, chosen == "debug")
    if not loud:
        for module in ("mlflow", "prefect", "pydantic", "sklearn", "distributed", "dask", "pandera", "torch"):
            warnings.filterwarnings("ignore", module=rf"{module}(\.|$)")
    return chosen


def _quiet_live_loggers(loud: bool, debug: bool) -> None:
    threshold = logging.DEBUG if debug else logging.INFO if loud else logging.ERROR
    for name in LIBRARY_LOGGERS:
        if name == "prefect" and "prefect" not in sys.modules:
            continue  # Prefect configures itself from the environment set above when it is imported
        logging.getLogger(name).setLevel(threshold if name != "prefect" else
                                         (logging.DEBUG if debug else logging.INFO if loud else logging.WARNING))
    console_level = logging.NOTSET if loud else logging.CRITICAL
    for handler in logging.getLogger().handlers:
        if type(handler).__name__ == "PrefectConsoleHandler":
            handler.setLevel(console_level)


# --- values for scripts -----------------------------------------------------------------------------------------

_NUMBER = r"[+-]?(?:\d+(?:,\d{3})*(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_INTERVAL = re.compile(rf"^\s*({_NUMBER})(%?)\s*\[\s*({_NUMBER})%?\s*,\s*({_NUMBER})%?\s*\]\s*$")
_PLAIN = re.compile(rf"^\s*({_NUMBER})(%?)\s*$")


def _float(text: str) -> float:
    return float(text.replace(",", ""))


def figure_value(value: Any) -> Any:
    """A figure as a script wants it: ``"+4.10% [+2.95%, +5.20%]"`` becomes ``{"value": 0.041, "low": 0.0295,
    "high": 0.052}`` (percentages as fractions), ``"12.5"`` becomes 12.5; other text stays text."""
    if not isinstance(value, str):
        return plain(value)
    found = _INTERVAL.match(value)
    if found:
        scale = 0.01 if found.group(2) else 1.0
        return {"value": _float(found.group(1)) * scale, "low": _float(found.group(3)) * scale,
                "high": _float(found.group(4)) * scale}
    found = _PLAIN.match(value)
    if found:
        return _float(found.group(1)) * (0.01 if found.group(2) else 1.0)
    return value


def plain(value: Any) -> Any:
    """numpy and pandas scalars as Python ones; NaN and missing as None (JSON null)."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, str | bytes):
        try:
            value = value.item()
        except (ValueError, TypeError):
            pass
    if isinstance(value, float) and not math.isfinite(value):
        return None
    try:
        import pandas as pd

        if value is pd.NaT or (not isinstance(value, list | dict | str) and pd.isna(value)):
            return None
    except (TypeError, ValueError):
        pass
    return value


def to_json(data: list | dict) -> str:
    """JSON with numbers as numbers and NaN as null (strict JSON has no NaN)."""
    return json.dumps(plain(data), indent=2, ensure_ascii=False, allow_nan=False, default=str)


def to_csv(frame) -> str:
    """CSV with lists joined by '; ' and dicts as JSON text, so every cell is one field."""
    shown = frame.copy()
    for column in shown.columns:
        shown[column] = shown[column].map(
            lambda v: "; ".join(map(str, v)) if isinstance(v, list | tuple)
            else json.dumps(plain(v)) if isinstance(v, dict) else v)
    return shown.to_csv(index=False)


# --- tables for people ------------------------------------------------------------------------------------------


def table(frame, *, title: str | None = None, wrap: tuple[str, ...] = (), right: tuple[str, ...] = (),
          styles: dict[str, dict[str, str]] | None = None) -> Table:
    """A compact table: columns keep their words whole (no wrapping) except those in ``wrap``, which take the
    rest of the width and wrap between words; cells are plain text (category names may hold brackets)."""
    shown = Table(title=title, box=box.SIMPLE_HEAD, pad_edge=False, padding=(0, 1), title_justify="left")
    for column in frame.columns:
        wraps = column in wrap
        shown.add_column(str(column), no_wrap=not wraps, overflow="fold" if wraps else "ellipsis",
                         justify="right" if column in right else "left", ratio=1 if wraps else None,
                         min_width=14 if wraps else None)
    for row in frame.itertuples(index=False):
        cells = []
        for column, value in zip(frame.columns, row, strict=True):
            text = "" if plain(value) is None else ("\n".join(map(str, value)) if isinstance(value, list | tuple)
                                                   else str(value))
            style = (styles or {}).get(column, {}).get(text, "")
            cells.append(Text(text, style=style))
        shown.add_row(*cells)
    return shown


def emit(frame, fmt: Format, console: Console, *, title: str | None = None, records=None, **table_options) -> None:
    """Print ``frame`` as a table, CSV or JSON (``records`` instead of the frame's rows for JSON when given)."""
    import typer

    if fmt is Format.csv:
        typer.echo(to_csv(frame), nl=False)
    elif fmt is Format.json:
        typer.echo(to_json(records if records is not None else frame.to_dict("records")))
    else:
        console.print(table(frame, title=title, **table_options))


def strip_markdown(text: str) -> str:
    """A note's first line without Markdown marks (headings, emphasis, code ticks, table bars)."""
    text = re.sub(r"^\s*#+\s*", "", text or "")
    text = re.sub(r"(\*\*|__|`)", "", text)
    return text.strip(" |").strip()
