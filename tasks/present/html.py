"""HTML building blocks for entivec's reports: escaping, tables, embedded PNG images, simple Markdown, one page.

Every page is one self-contained file: styles inline, images as base64 PNG, no script, no network.
"""

from __future__ import annotations

import base64
import html
import io
import re
from datetime import UTC, datetime
from typing import Any

import matplotlib

matplotlib.use("Agg")  # files only, never a window

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

CAUTION = (
    "Vectors of places or groups (postcodes, stores, depots, ...) can stand in for protected attributes of the "
    "people behind them; check what they encode before they feed decisions about people."
)

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:2em auto;max-width:1100px;
color:#1d232a;line-height:1.45;padding:0 1em}
h1{font-size:1.6em;border-bottom:2px solid #d0d7de;padding-bottom:.3em}h2{font-size:1.25em;margin-top:1.8em}
h3{font-size:1.05em}table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
table{max-width:100%}th,td{border:1px solid #d0d7de;padding:.25em .6em;text-align:left;vertical-align:top;
overflow-wrap:anywhere}
th{background:#f3f5f7;overflow-wrap:normal}table.wide{font-size:.78em}table.wide th{overflow-wrap:anywhere}
td.num{text-align:right;font-variant-numeric:tabular-nums}
.pass{color:#1a7f37;font-weight:600}.fail{color:#cf222e;font-weight:600}.info{color:#57606a}
.verdict{font-size:1.15em;padding:.5em .8em;border-radius:6px;display:inline-block}
.verdict.pass{background:#dafbe1}.verdict.fail{background:#ffebe9}
img{max-width:100%;border:1px solid #eaeef2;margin:.4em 0}.muted{color:#57606a;font-size:.9em}
.caution{background:#fff8c5;border:1px solid #d4a72c;padding:.6em .8em;border-radius:6px}
pre{background:#f6f8fa;padding:.6em;overflow-x:auto}
"""


def esc(value: Any) -> str:
    return html.escape("" if value is None else str(value))


def png_bytes(fig) -> bytes:
    buffer = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buffer, format="png", dpi=100)
    plt.close(fig)
    return buffer.getvalue()


def image(data: bytes, alt: str) -> str:
    return f'<img alt="{esc(alt)}" src="data:image/png;base64,{base64.b64encode(data).decode("ascii")}">'


def _cell(value: Any) -> str:
    if isinstance(value, (bool, np.bool_)):
        return f"<td>{'yes' if value else 'no'}</td>"
    if isinstance(value, (float, np.floating)):
        text = "" if not np.isfinite(value) else f"{value:.6g}"
        return f'<td class="num">{text}</td>'
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f'<td class="num">{value}</td>'
    if isinstance(value, str) and value in ("pass", "FAIL", "info"):
        return f'<td class="{ {"pass": "pass", "FAIL": "fail", "info": "info"}[value] }">{value}</td>'
    return f"<td>{esc(value)}</td>"


# Column names of our tables as a reader says them; any other name has its underscores turned into spaces.
HEADER_WORDS = {
    "count_older": "training rows, older version", "count_newer": "training rows, newer version",
    "drift": "drift (aligned distance / spread)", "categories_older": "categories, older version",
    "categories_newer": "categories, newer version", "dimension_older": "vector length, older version",
    "dimension_newer": "vector length, newer version", "added_share": "added (share)",
    "dropped_share": "dropped (share)", "neighbour_overlap": "neighbour overlap", "chance_overlap": "overlap by chance",
    "rmse": "RMSE", "mae": "MAE", "r2": "R²", "log_loss": "log loss", "roc_auc": "ROC AUC", "mse": "MSE",
    "relative_spread": "relative spread", "in_all_folds": "in every fold", "from_version": "from version",
    "to_version": "to version", "data_fingerprint": "data fingerprint", "state_note": "state note",
    "noise": "own noise (relative)", "moved": "movement against own noise",
    "seed_neighbour_overlap": "neighbour overlap between seeds", "seed_chance_overlap": "overlap by chance",
    "seed_aligned_distance": "aligned distance between seeds", "seed_categories": "categories measured",
}


def header(name: object) -> str:
    text = str(name)
    return HEADER_WORDS.get(text, text.replace("_", " "))


def table(frame: pd.DataFrame) -> str:
    if frame is None or frame.empty:
        return '<p class="muted">(nothing to show)</p>'
    # many columns: a smaller type, and headers may break inside a word rather than push the table off the page
    wide = ' class="wide"' if len(frame.columns) > 8 else ""
    head = "".join(f"<th>{esc(header(c))}</th>" for c in frame.columns)
    body = "".join("<tr>" + "".join(_cell(v) for v in row) + "</tr>" for row in frame.itertuples(index=False))
    return f"<table{wide}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def markdown(text: str) -> str:
    """The small part of Markdown our summaries use: headings, bullet lists, paragraphs, `code`, **bold**."""
    out, items, para = [], [], []

    def inline(s: str) -> str:
        s = esc(s)
        s = re.sub(r"`([^`]+)`", r"<code>\1</code>", s)
        return re.sub(r"\*\*([^*]+)\*\*", r"<strong>\1</strong>", s)

    def flush() -> None:
        if items:
            out.append("<ul>" + "".join(f"<li>{inline(i)}</li>" for i in items) + "</ul>")
            items.clear()
        if para:
            out.append(f"<p>{inline(' '.join(para))}</p>")
            para.clear()

    for line in text.splitlines():
        stripped = line.strip()
        heading = re.match(r"^(#{1,6})\s+(.*)$", stripped)
        if heading:
            flush()
            level = min(len(heading.group(1)) + 2, 6)  # the page's own h1/h2 stay above
            out.append(f"<h{level}>{inline(heading.group(2))}</h{level}>")
        elif stripped.startswith(("- ", "* ")):
            if para:
                flush()
            items.append(stripped[2:])
        elif not stripped:
            flush()
        else:
            if items:
                flush()
            para.append(stripped)
    flush()
    return "\n".join(out)


def page(title: str, body: list[str]) -> str:
    stamp = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    return (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{esc(title)}</title>'
        f"<style>{_CSS}</style></head><body><h1>{esc(title)}</h1>" + "\n".join(body)
        + f'<p class="caution">{esc(CAUTION)}</p><p class="muted">Written by entivec at {stamp}.</p></body></html>'
    )


def facts(pairs: list[tuple[str, Any]]) -> str:
    rows = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in pairs if v not in (None, ""))
    return f"<table>{rows}</table>"
