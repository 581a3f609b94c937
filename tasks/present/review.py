"""The review page of a version: what it holds, assembled from the registry and written as one HTML file.

Per embedded column the page carries every known category (the unknown row 0 is left out: it stands for
whatever was rare or missing) with its training count, its confidence when the vector set has one, its group
(the spec's ``review.groups``), whether it is new against production, its k nearest neighbours with their
Euclidean distances (exact: measured by the page from the float32 vectors, or computed here and carried when
a column's vectors hold too many numbers) and its place on the first two principal axes. Categories production
held and this version dropped are shown at production's place, aligned onto this version by orthogonal
Procrustes on the shared categories. The gate's figures come from the evidence runs of every gate that judged
the version.
"""

from __future__ import annotations

import base64
import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from prefect import task
from prefect.cache_policies import NO_CACHE

from entivec.schemas.spec import Spec
from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import category_strings
from entivec.settings import project_home
from entivec.tasks.apply.outputs import write_text_atomically
from entivec.tasks.evidence.align import align_to
from entivec.tasks.lifecycle import registry
from entivec.tasks.lifecycle.track import link_in_prefect, now_iso, operator
from entivec.tasks.present.html import esc, table
from entivec.tasks.present.report import (
    PublishedReport,
    artifact_link,
    gate_runs,
    text_artifact,
)
from entivec.tasks.present.review_page import review_page

REVIEW_FOLDER = "review"
REVIEW_PAGE = "review.html"
GROUPS_FILE = "groups.json"
# Entries of the distance matrix computed at once (rows x categories): about 40 MB of float32.
_BLOCK = 10_000_000
# Vector components (categories x dimension) the page carries and measures distances from itself; a bigger
# column carries its precomputed neighbours instead (categories x k indices and distances).
_VECTOR_BUDGET = 4_000_000
# Up to this vector length a k-d tree finds neighbours far faster than brute force; beyond it, it does not.
_TREE_MAX_DIMENSION = 6


# --- neighbours and the map ---------------------------------------------------------------------------------------


def nearest(points: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """(n, k) indices and Euclidean distances of each row's k nearest other rows, nearest first (ties: lower index).

    Candidates come from a k-d tree (scipy) when the vectors are short, else from the squared-distance expansion in
    chunks of rows; a few spare candidates are then measured directly and sorted, so rounding cannot reorder near
    neighbours. Both searches are exact.
    """
    x = np.asarray(points, dtype=np.float64)
    n = x.shape[0]
    k = min(k, n - 1)
    if k < 1:
        return np.zeros((n, 0), np.int32), np.zeros((n, 0), np.float32)
    spare = min(k + 8, n - 1)
    idx = np.empty((n, k), np.int32)
    dist = np.empty((n, k), np.float32)
    if x.shape[1] <= _TREE_MAX_DIMENSION:
        from scipy.spatial import cKDTree

        _, found = cKDTree(x).query(x, k=spare + 1)  # the row itself (or a copy of it) is among them
        others = found != np.arange(n)[:, None]
        cand = np.take_along_axis(found, np.argsort(~others, axis=1, kind="stable")[:, :spare], axis=1)
        _measured(x, cand, np.arange(n), k, idx, dist)
        return idx, dist
    # Ranking within a row needs only |x_j|^2 - 2 x_i.x_j (|x_i|^2 is the same for the whole row), in float32:
    # one matrix product and one in-place addition per chunk; the spare candidates absorb the rounding.
    x32 = x.astype(np.float32)
    squared = np.einsum("ij,ij->i", x32, x32)
    chunk = max(1, _BLOCK // n)
    for start in range(0, n, chunk):
        stop = min(start + chunk, n)
        d2 = x32[start:stop] @ x32.T
        d2 *= -2.0
        d2 += squared[None, :]
        d2[np.arange(stop - start), np.arange(start, stop)] = np.inf  # a category is not its own neighbour
        cand = np.argpartition(d2, spare - 1, axis=1)[:, :spare]
        _measured(x, cand, np.arange(start, stop), k, idx, dist)
    return idx, dist


def _measured(x: np.ndarray, cand: np.ndarray, rows: np.ndarray, k: int, idx: np.ndarray, dist: np.ndarray) -> None:
    """Distances of ``rows`` to their candidates measured directly; the k nearest (then lower index) kept."""
    exact = np.empty(cand.shape)
    for j in range(cand.shape[1]):  # one candidate column at a time: memory stays rows x dimension
        exact[:, j] = np.linalg.norm(x[cand[:, j]] - x[rows], axis=1)
    order = np.lexsort((cand, exact), axis=1)[:, :k]
    idx[rows] = np.take_along_axis(cand, order, axis=1)
    dist[rows] = np.take_along_axis(exact, order, axis=1)


def principal_map(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Coordinates on the first two principal axes, the share of variance each explains, the mean and the axes."""
    x = np.asarray(points, dtype=np.float64)
    mean = x.mean(axis=0) if len(x) else np.zeros(x.shape[1])
    if len(x) < 2:
        return np.zeros((len(x), 2)), np.zeros(2), mean, np.zeros((x.shape[1], 2))
    _, s, vt = np.linalg.svd(x - mean, full_matrices=False)
    axes = vt[:2].T
    variance = s**2
    explained = variance[:2] / variance.sum() if variance.sum() > 0 else np.zeros(min(2, len(s)))
    if axes.shape[1] < 2:  # one-dimensional vectors: the second axis is empty
        axes = np.hstack([axes, np.zeros((axes.shape[0], 1))])
        explained = np.append(explained, 0.0)
    return (x - mean) @ axes, explained, mean, axes


def _b64(values: np.ndarray, dtype: str) -> str:
    return base64.b64encode(np.ascontiguousarray(values, dtype=dtype).tobytes()).decode("ascii")


def _pad(matrix: np.ndarray, width: int) -> np.ndarray:
    m = np.asarray(matrix, dtype=np.float64)
    return m if m.shape[1] == width else np.hstack([m, np.zeros((m.shape[0], width - m.shape[1]))])


def column_data(
    column: str,
    vector_set: VectorSet,
    *,
    production: VectorSet | None = None,
    groups: dict | None = None,
    neighbours: int = 10,
) -> dict:
    """Everything the page shows of one column, arrays as base64 little-endian bytes."""
    vocab = vector_set.vocabularies[column]
    vectors = np.asarray(vector_set.vectors[column], dtype=np.float64)[1:]
    categories = [str(c) for c in vocab.categories[1:]]
    counts = np.asarray(vocab.counts[1:], dtype=np.int64)
    xy, explained, mean, axes = principal_map(vectors)
    out = {
        "name": column, "categories": categories, "counts": _b64(counts.astype(np.float64), "<f8"),
        "unknown_count": int(vocab.counts[0]), "dimension": int(vectors.shape[1]),
        "k": int(min(neighbours, max(len(categories) - 1, 0))), "vectors": None, "neighbours": None,
        "distances": None, "xy": _b64(xy, "<f4"), "explained": [float(v) for v in explained[:2]], "new": None,
        "dropped": [], "confidence": None, "groups": None,
    }
    if vectors.size <= _VECTOR_BUDGET:  # the page measures distances itself, from the stored float32 vectors
        out["vectors"] = _b64(vector_set.vectors[column][1:], "<f4")
    else:  # too many numbers to carry: the neighbours travel instead
        idx, dist = nearest(vectors, neighbours)
        out["neighbours"], out["distances"] = _b64(idx, "<i4"), _b64(dist, "<f4")
    table_ = vector_set.confidence.get(column)
    if table_ is not None and len(table_) == vocab.size:
        ordered = table_.sort_values("id")
        out["confidence"] = {
            "spread": _b64(ordered["spread"].to_numpy(dtype=np.float64)[1:], "<f4"),
            "relative_spread": _b64(ordered["relative_spread"].to_numpy(dtype=np.float64)[1:], "<f4"),
            "in_all_folds": _b64(ordered["in_all_folds"].fillna(False).to_numpy(dtype=bool)[1:], "<u1"),
        }
    if production is not None and column in production.vectors:
        out.update(_against_production(column, vector_set, production, mean, axes))
    if groups and groups.get("categories"):
        labels = pd.Series(categories, dtype="string").map(groups["categories"])
        ranked = labels.value_counts(dropna=True)
        names = [str(g) for g in ranked.index]
        position = {g: i for i, g in enumerate(names)}
        codes = np.array([position.get(g, -1) if isinstance(g, str) else -1 for g in labels], dtype=np.int32)
        out["groups"] = {"column": groups.get("group_column", ""), "names": names, "codes": _b64(codes, "<i4")}
    elif groups and groups.get("note"):
        out["groups_note"] = groups["note"]
    return out


def _against_production(column: str, mine: VectorSet, production: VectorSet, mean: np.ndarray,
                        axes: np.ndarray) -> dict:
    """New categories (flags) and dropped ones (placed at production's aligned vector) against production."""
    own = pd.Index(mine.vocabularies[column].categories[1:], dtype="string")
    theirs = pd.Index(production.vocabularies[column].categories[1:], dtype="string")
    new = ~own.isin(theirs)
    dropped_mask = ~theirs.isin(own)
    dropped = []
    if dropped_mask.any():
        shared = theirs[~dropped_mask]
        width = max(mine.dimension(column), production.dimension(column))
        their_rows = np.flatnonzero(~dropped_mask) + 1
        gone_rows = np.flatnonzero(dropped_mask) + 1
        their_vectors = _pad(production.vectors[column], width)
        source = np.vstack([their_vectors[their_rows], their_vectors[gone_rows]])
        target = np.zeros_like(source)
        target[: len(shared)] = _pad(mine.vectors[column], width)[own.get_indexer(shared) + 1]
        if len(shared) >= 2:
            placed = align_to(source, target, rows=np.arange(len(shared)))[len(shared):, : mine.dimension(column)]
            xy = (placed - mean) @ axes
        else:  # nothing to align on: no place on this map
            xy = np.full((len(gone_rows), 2), np.nan)
        counts = np.asarray(production.vocabularies[column].counts)[gone_rows]
        dropped = [{"category": str(c), "count": int(n), "x": _finite(p[0]), "y": _finite(p[1])}
                   for c, n, p in zip(theirs[dropped_mask], counts, xy, strict=True)]
    return {"new": _b64(new.astype(np.uint8), "<u1"), "dropped": dropped}


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


# --- groups, from the training data -------------------------------------------------------------------------------


class GroupTally:
    """Rows per (category, group value) of the columns named in ``review.groups``, summed batch by batch: what
    :func:`category_groups` needs, bounded by the categories and groups, not by the rows."""

    def __init__(self, spec: Spec) -> None:
        self.spec = spec
        self.columns: set[str] | None = None
        self.tallies: dict[str, pd.Series] = {}

    def update(self, raw: pd.DataFrame) -> None:
        if self.columns is None:
            self.columns = {str(c) for c in raw.columns}
        for column, group_column in self.spec.review.groups.items():
            if group_column not in raw.columns or column not in raw.columns:
                continue
            frame = pd.DataFrame({"c": category_strings(raw[column]), "g": category_strings(raw[group_column])})
            tally = frame.dropna().value_counts(["c", "g"])
            before = self.tallies.get(column)
            self.tallies[column] = tally if before is None else before.add(tally, fill_value=0)

    def result(self) -> dict:
        out = {}
        for column, group_column in self.spec.review.groups.items():
            if self.columns is not None and (group_column not in self.columns or column not in self.columns):
                out[column] = {"group_column": group_column, "categories": {},
                               "note": f"review.groups: column {group_column!r} is not in the training data"}
                continue
            if column not in self.tallies or not len(self.tallies[column]):
                out[column] = {"group_column": group_column, "categories": {}}
                continue
            tally = self.tallies[column].astype("int64").reset_index(name="n")
            # most frequent group per category; ties go to the group that sorts first
            tally = tally.sort_values(["c", "n", "g"], ascending=[True, False, True], kind="stable")
            first = tally.drop_duplicates("c")
            out[column] = {"group_column": group_column,
                           "categories": dict(zip(first["c"].astype(str), first["g"].astype(str), strict=True))}
        return out


def category_groups(raw: pd.DataFrame, spec: Spec) -> dict:
    """Per embedded column named in ``review.groups``: each category's most frequent value of its group column."""
    tally = GroupTally(spec)
    tally.update(raw)
    return tally.result()


def write_groups(raw: pd.DataFrame | GroupTally, spec: Spec, folder: Path) -> None:
    """``folder/review/groups.json`` for the train run's artifacts (nothing when the spec names no groups); ``raw``
    is the table as read or a tally of it made batch by batch."""
    if not spec.review.groups:
        return
    target = Path(folder) / REVIEW_FOLDER
    target.mkdir(parents=True, exist_ok=True)
    groups = raw.result() if isinstance(raw, GroupTally) else category_groups(raw, spec)
    payload = {"neighbours": spec.review.neighbours, "columns": groups}
    (target / GROUPS_FILE).write_text(json.dumps(payload, ensure_ascii=False), encoding="utf-8")


# --- the page ---------------------------------------------------------------------------------------------------


def _gate_sections(name: str, number: str) -> list[str]:
    parts = []
    for run in gate_runs(name, number)[:5]:
        evidence = text_artifact(run.info.run_id, "gate/evidence.json")
        if evidence is None:
            continue
        data = json.loads(evidence)
        verdict = run.data.tags.get(f"{registry.TAG_PREFIX}verdict", "")
        against = f"production version {data['production_version']}" if data.get("production_version") \
            else "the no-category baseline"
        when = pd.Timestamp(run.info.start_time, unit="ms", tz="UTC").strftime("%Y-%m-%d %H:%M UTC")
        parts.append(f'<h3>Gate of {esc(when)} against {esc(against)}: '
                     f'<span class="{"pass" if verdict == "pass" else "fail"}">{esc(verdict.upper())}</span></h3>')
        parts.append(table(pd.DataFrame([{"group": ch["group"], "check": ch["name"],
                                          "verdict": {True: "pass", False: "FAIL", None: "info"}[ch["passed"]],
                                          "figures": ch["message"]} for ch in data["checks"]])))
        if data.get("downstream"):
            parts.append(table(pd.DataFrame(data["downstream"])))
    return parts


def review_data(name: str, number: str, vector_set: VectorSet, *, production: VectorSet | None,
                production_version: str | None, groups: dict, neighbours: int, facts: list[tuple[str, str]]) -> dict:
    return {
        "model": name, "version": number, "production_version": production_version,
        "facts": [[k, v] for k, v in facts if v not in (None, "")],
        "columns": [column_data(col, vector_set, production=production, groups=groups.get(col),
                                neighbours=neighbours) for col in vector_set.columns],
    }


def review_page_html(name: str, version: str) -> str:
    """The review page of one version, read from the registry."""
    mv = registry.resolve(name, version)
    number = str(mv.version)
    loaded = registry.load_version(name, number)
    aliases = registry.aliases_of(name)
    production_version = aliases.get(registry.PRODUCTION)
    production = None
    if production_version and production_version != number:
        production = registry.load_version(name, production_version).vector_set
    stored = text_artifact(mv.run_id, f"{REVIEW_FOLDER}/{GROUPS_FILE}")
    stored = json.loads(stored) if stored else {}
    facts = [("model", name), ("version", number),
             ("aliases now", ", ".join(sorted(a for a, v in aliases.items() if v == number)) or "none"),
             ("compared with", f"production (version {production_version})" if production is not None else
              ("nothing: this version is production" if production_version == number else "nothing: no production")),
             ("train run", mv.run_id),
             ("data fingerprint", mv.tags.get(f"{registry.TAG_PREFIX}data_fingerprint"))]
    data = review_data(name, number, loaded.vector_set, production=production,
                       production_version=production_version if production is not None else None,
                       groups=stored.get("columns", {}), neighbours=int(stored.get("neighbours", 10)), facts=facts)
    return review_page(f"{name} version {number}: review", data, _gate_sections(name, number))


def publish_review_page(name: str, version: str, out: str | Path | None = None) -> PublishedReport:
    """Write a version's review page, log it to its train run, and link it from the current Prefect run (if any)."""
    mv = registry.resolve(name, version)
    number = str(mv.version)
    text = review_page_html(name, number)
    path = Path(out) if out else project_home() / "reports" / name / f"review-{number}.html"
    write_text_atomically(path, text, "the review page")  # all or nothing, mode per umask
    with tempfile.TemporaryDirectory(prefix="review-", dir=project_home()) as scratch:
        staged = Path(scratch) / REVIEW_PAGE
        staged.write_text(text, encoding="utf-8")
        registry.client().log_artifact(mv.run_id, str(staged), REVIEW_FOLDER)
    link = artifact_link(mv.run_id, f"{REVIEW_FOLDER}/{REVIEW_PAGE}")
    link_in_prefect(f"{name}-v{number}-review", link, f"{name} version {number}: review page",
                    f"Review page of **{name}** version {number}, written {now_iso()} by {operator()}.")
    return PublishedReport(path, mv.run_id, link)


@task(name="publish-review-page", cache_policy=NO_CACHE, retries=1)
def publish_review_page_task(name: str, version: str, out: str | None = None) -> PublishedReport:
    return publish_review_page(name, version, out)
