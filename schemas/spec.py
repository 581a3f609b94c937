"""The dataset spec: one YAML file describes a dataset, its cleaning rules and how to train and judge vectors.

Longer than 500 lines because the spec is one pydantic model tree, and the code that turns its validation
errors into messages naming file and key walks that same tree; split apart, each half would import the other.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import typing
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import BaseModel, Field, ValidationError, field_validator, model_validator

from entivec.schemas.promotion import PromotionSpec
from entivec.schemas.review import ReviewSpec
from entivec.schemas.strict import BOOL_FOR_NUMBER, Strict

SPEC_VERSION = 1
ROW_ID = "_row_id"  # the id column entivec adds when the spec names none: the row number in read order, as text
MODEL_NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,127}$"


class SpecError(ValueError):
    """A spec file that cannot be used; the message names the file, the key and what was expected."""


_Strict = Strict  # unknown keys, booleans for numbers and NaN are errors in every section (schemas/strict.py)


# --- embedding sizes -------------------------------------------------------------------------------------------

SizeRule = Literal["fourth_root", "half_capped", "power_056"]


def embedding_size(cardinality: int, rule: SizeRule) -> int:
    """Vector length for a column with ``cardinality`` categories (the unknown row included) by a named rule.

    - ``fourth_root``: ceil(n ** 0.25), a widely quoted rule of thumb for embedding columns
      (common practice, no source).
    - ``half_capped``: min(50, ceil(n / 2)), taught in early deep-learning-for-tabular-data courses
      (common practice, no source; the cap of 50 is from memory).
    - ``power_056``: min(600, round(1.6 * n ** 0.56)), the empirical fit used as the default size rule of
      the fastai library (Howard & Gugger, "fastai: A Layered API for Deep Learning", Information 2020).
    """
    n = max(int(cardinality), 2)
    if rule == "fourth_root":
        return max(1, math.ceil(n**0.25))
    if rule == "half_capped":
        return max(1, min(50, math.ceil(n / 2)))
    if rule == "power_056":
        return max(1, min(600, round(1.6 * n**0.56)))
    raise ValueError(f"unknown size rule {rule!r}")


# --- parts of the spec -----------------------------------------------------------------------------------------


class SourceSpec(_Strict):
    path: str = Field(description="A file or a glob, relative to the spec file's folder.")
    format: Literal["auto", "csv", "parquet"] = "auto"
    encoding: str = "utf-8"
    delimiter: str = Field(",", min_length=1, max_length=1)


class TargetSpec(_Strict):
    column: str
    task: Literal["regression", "binary"]
    transform: Literal["none", "log", "log1p"] = "none"


class EmbedColumn(_Strict):
    name: str
    size: Annotated[int, Field(ge=1, le=600)] | None = None
    # fourth_root: fastest and the lowest held-out loss across three seeds, geometry checks equal
    # (benchmarks/bench_size_rule.py; README "Default vector size")
    size_rule: SizeRule = "fourth_root"
    min_count: Annotated[int, Field(ge=1)] = 1
    nullable: bool = True

    def resolved_size(self, cardinality: int) -> int:
        return self.size if self.size is not None else embedding_size(cardinality, self.size_rule)


class OneHotColumn(_Strict):
    name: str
    nullable: bool = True


class NumericColumn(_Strict):
    """A numeric input. ``integer`` declares a count: whole numbers >= 0 only, anything else is quarantined.

    ``impute: median`` lets missing values through and fills them with the training rows' median, adding an
    indicator input ``<name>=missing`` (1 where the value was missing); the median travels with the vector set's
    network encoder, so every later use (gate, apply) fills the same way. ``transform`` (``log``, ``log1p``) is
    applied before standardising; values outside its domain (<= 0 for log, <= -1 for log1p) are quarantined.
    """

    name: str
    min: float | None = None
    max: float | None = None
    nullable: bool = False
    integer: bool = False
    impute: Literal["none", "median"] = "none"
    transform: Literal["none", "log", "log1p"] = "none"

    @model_validator(mode="after")
    def _ordered(self) -> NumericColumn:
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError(f"min ({self.min}) is larger than max ({self.max})")
        return self


def _named(value: Any) -> Any:
    # A bare column name is shorthand for {name: ...}.
    return {"name": value} if isinstance(value, str) else value


class ColumnsSpec(_Strict):
    embed: list[EmbedColumn] = Field(min_length=1)
    onehot: list[OneHotColumn] = []
    numeric: list[NumericColumn] = []

    @field_validator("embed", "onehot", "numeric", mode="before")
    @classmethod
    def _shorthand(cls, value: Any) -> Any:
        return [_named(v) for v in value] if isinstance(value, list) else value


# --- cleaning rules: applied in the order written ---------------------------------------------------------------


class RangeRule(_Strict):
    """Keep rows whose value lies in the range; quarantine the others (and rows where it is missing)."""

    kind: Literal["range"]
    column: str
    min: float | None = None
    max: float | None = None
    inclusive: bool = True

    @model_validator(mode="after")
    def _bounded(self) -> RangeRule:
        if self.min is None and self.max is None:
            raise ValueError("a range rule needs min, max or both")
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError(f"min ({self.min}) is larger than max ({self.max})")
        return self


class Condition(_Strict):
    column: str
    equals: float | int | str | bool | None = None
    is_missing: bool | None = None

    @model_validator(mode="after")
    def _one(self) -> Condition:
        if (self.equals is None) == (self.is_missing is None):
            raise ValueError("a condition takes exactly one of 'equals' or 'is_missing'")
        return self


class FillRule(_Strict):
    """Fill missing values of ``column`` with ``value`` where ``when`` holds; nulls elsewhere are reported."""

    kind: Literal["fill"]
    column: str
    value: float | int | str | bool
    when: Condition | None = None
    otherwise: Literal["keep", "quarantine"] = "keep"


class DropMissingRule(_Strict):
    """Quarantine rows where ``column`` is missing."""

    kind: Literal["drop_missing"]
    column: str


Rule = Annotated[RangeRule | FillRule | DropMissingRule, Field(discriminator="kind")]


# --- split, training, evaluation --------------------------------------------------------------------------------


class SplitSpec(_Strict):
    """``random``: a seeded share of the rows is held out. ``hash``: a row is held out when a seeded hash of its id
    falls in the test share, so a row keeps its side in every re-run and every later drop, and a table read as a
    stream splits batch by batch. ``time``: rows at or after a moment are held out, the
    moment being a fixed ``cutoff`` or, with ``last_weeks``, that many weeks before the newest time in the data
    (a window that rolls forward with every new drop)."""

    method: Literal["random", "hash", "time"] = "random"
    test_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.2
    seed: int = 0
    time_column: str | None = None
    cutoff: str | None = Field(None, description="Rows at or after this time are held out.")
    last_weeks: Annotated[int, Field(ge=1, le=5200)] | None = Field(
        None, description="Hold out the rows of the last N weeks before the newest time in the data."
    )

    @model_validator(mode="after")
    def _time_needs_column(self) -> SplitSpec:
        if self.method == "time":
            if self.time_column is None or (self.cutoff is None and self.last_weeks is None):
                raise ValueError("a time split needs time_column and cutoff (or last_weeks, for a rolling window)")
            if self.cutoff is not None and self.last_weeks is not None:
                raise ValueError("a time split takes cutoff (a fixed moment) or last_weeks (rolling), not both")
        elif self.last_weeks is not None:
            raise ValueError("last_weeks belongs to a time split (method: time)")
        return self


class TrainingSpec(_Strict):
    # None: an epoch budget from the table's size (see tasks/train/trainer.py: epoch_budget): at least 30 epochs and
    # at least `step_budget` optimizer steps, so a small table trains until early stopping ends it.
    epochs: Annotated[int, Field(ge=1, le=10_000)] | None = None
    step_budget: Annotated[int, Field(ge=1)] = 6_000
    batch_size: Annotated[int, Field(ge=1)] = 1024
    learning_rate: Annotated[float, Field(gt=0, le=1)] = 3e-3
    weight_decay: Annotated[float, Field(ge=0)] = 0.0
    # [64, 32] rather than [128, 64]: on the benchmark table (benchmarks/bench_trainer.py) it reached an equal or
    # lower best validation loss with both size rules and three seeds, and trains about 1.5x faster per epoch.
    hidden: list[Annotated[int, Field(ge=1)]] = [64, 32]
    dropout: Annotated[float, Field(ge=0, lt=1)] = 0.0
    patience: Annotated[int, Field(ge=1)] = 4
    validation_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.15
    seed: int = 0
    threads: Annotated[int, Field(ge=1, le=256)] | None = None
    progress: bool = True


class EvaluationSpec(_Strict):
    # Defaults chosen by measurement (benchmarks/bench_evidence.py, README "Measurements"): on a 1 M-row table
    # the evaluation costs no more than the vector training. Three folds of a 100,000-row sample cost 200,000
    # network rows per epoch against 800,000 for five folds of 200,000; histogram gradient boosting fitted
    # 20,000 rows in 1.5 s where a 100-tree random forest took 19-25 s with a worse RMSE; the linear model adds
    # a second, cheap model family (random forest stays available by name). With 20,000 downstream and 50,000
    # test rows the downstream models alone took 38 s against 49 s of training, hence 10,000 and 20,000 (and
    # native categorical splits for gradient boosting's one-hot set, tasks/evidence/downstream.py).
    folds: Annotated[int, Field(ge=2, le=20)] = 3
    models: Annotated[list[Literal["random_forest", "hist_gradient_boosting", "linear"]], Field(min_length=1)] = [
        "hist_gradient_boosting",
        "linear",
    ]
    onehot_max_categories: Annotated[int, Field(ge=2)] = 64
    # Rows the downstream models train on (a seeded sample of the training rows) and are scored on (of the test
    # rows), and rows the fold networks train on: caps, so the evidence stops growing with the table.
    max_train_rows: Annotated[int, Field(ge=100)] | None = 10_000
    max_test_rows: Annotated[int, Field(ge=100)] | None = 20_000
    max_fold_rows: Annotated[int, Field(ge=100)] | None = 100_000
    # Train a second network on the same rows with another seed and log how far the two agree per column
    # (tasks/evidence/stability.py): how much of a version-to-version change a reseed alone makes.
    seed_check: bool = True
    seed: int = 0


class DriftSpec(_Strict):
    """What stops an incremental retrain (``train --incremental``): drift of the new data against production.

    PSI (population stability index) is read by common practice (no source) as < 0.1 stable, 0.1-0.25 moderate,
    > 0.25 major; ``max_psi`` defaults to that last boundary. The share of rows with a category production never
    saw stops the run above ``max_new_category_share`` (our default, not a standard). A schema change of a
    column the model uses (added, removed, type or role changed) stops it when ``on_schema_change`` is ``stop``.
    """

    max_psi: Annotated[float, Field(gt=0)] = 0.25
    max_new_category_share: Annotated[float, Field(ge=0, le=1)] = 0.2
    on_schema_change: Literal["stop", "warn"] = "stop"
    numeric_bins: Annotated[int, Field(ge=2, le=100)] = 10
    category_bins: Annotated[int, Field(ge=2, le=1000)] = 20
    ignore: list[str] = Field([], description="Columns reported but never a reason to stop.")


class ShrinkSpec(_Strict):
    """Shrink uncertain vectors at apply time (tasks/apply/lookup.py); recorded in each version, off by default.

    A category's vector moves toward ``rule``'s target (the unknown row, or the count-weighted mean of the known
    vectors) with weight r² / (r² + scale²), r its relative spread across the fold networks; above
    ``replace_above`` (when set) it is replaced by the target.
    """

    rule: Literal["off", "toward_unknown", "toward_mean"] = "off"
    scale: Annotated[float, Field(gt=0)] = 1.0
    replace_above: Annotated[float, Field(gt=0)] | None = None


class Spec(_Strict):
    """A whole dataset spec. ``name`` is the registered model that each trained vector set becomes a version of."""

    spec_version: Literal[1] = 1
    name: str = Field(pattern=MODEL_NAME_PATTERN)
    description: str = ""
    source: SourceSpec
    id_column: str | None = Field(None, description="Without one, the row number in read order is the id.")
    target: TargetSpec
    columns: ColumnsSpec
    rules: list[Rule] = []
    split: SplitSpec = SplitSpec()
    training: TrainingSpec = TrainingSpec()
    evaluation: EvaluationSpec = EvaluationSpec()
    promotion: PromotionSpec = PromotionSpec()
    shrink: ShrinkSpec = ShrinkSpec()
    drift: DriftSpec = DriftSpec()
    review: ReviewSpec = ReviewSpec()

    @model_validator(mode="after")
    def _columns_consistent(self) -> Spec:
        roles: dict[str, str] = {self.id_name: "id_column", self.target.column: "target.column"}
        if self.id_name == self.target.column:
            raise ValueError("id_column and target.column name the same column")
        for role, cols in (
            ("columns.embed", self.columns.embed),
            ("columns.onehot", self.columns.onehot),
            ("columns.numeric", self.columns.numeric),
        ):
            for col in cols:
                if col.name in roles:
                    raise ValueError(f"column {col.name!r} is listed in both {roles[col.name]} and {role}")
                roles[col.name] = role
        known = set(roles) | ({self.split.time_column} if self.split.time_column else set())
        for i, rule in enumerate(self.rules):
            names = [rule.column] + ([rule.when.column] if isinstance(rule, FillRule) and rule.when else [])
            for name in names:
                if name not in known:
                    raise ValueError(f"rules[{i}] names column {name!r}, which the spec does not declare")
        for name in self.drift.ignore:
            if name not in known:
                raise ValueError(f"drift.ignore names column {name!r}, which the spec does not declare")
        for name in self.review.groups:
            if name not in self.embed_names:
                raise ValueError(f"review.groups names column {name!r}, which is not in columns.embed")
        return self

    # convenience -----------------------------------------------------------------------------------------------
    @property
    def id_name(self) -> str:
        """The id column's name in the data: the spec's ``id_column``, or ROW_ID when rows are numbered instead."""
        return self.id_column if self.id_column is not None else ROW_ID

    @property
    def embed_names(self) -> list[str]:
        return [c.name for c in self.columns.embed]

    @property
    def onehot_names(self) -> list[str]:
        return [c.name for c in self.columns.onehot]

    @property
    def numeric_names(self) -> list[str]:
        return [c.name for c in self.columns.numeric]

    @property
    def feature_columns(self) -> list[str]:
        return self.embed_names + self.onehot_names + self.numeric_names

    def with_source(self, source: str) -> Spec:
        """This spec reading from ``source`` (a file or glob) instead; a relative one is taken from the working
        folder, as a path given on a command line is."""
        path = os.path.abspath(os.path.expanduser(source))
        return self.model_copy(update={"source": self.source.model_copy(update={"path": path})})

    def content_hash(self) -> str:
        """SHA-256 of the spec's canonical JSON: what identifies the recipe of a vector set.

        The ``drift`` and ``review`` sections are left out: the first decides whether a retrain runs, the second
        what the review page shows, neither what a run makes; specs written before them keep their hash.
        """
        recipe = _without_later_defaults(self.model_dump(mode="json", exclude={"drift", "review"}))
        canonical = json.dumps(recipe, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canonical.encode()).hexdigest()


# Keys added after specs were first hashed; left out of the hash while at their defaults, so a spec that does not
# use them keeps the hash it had (a retrain of unchanged data and spec is still recognised as such).
_LATER_DEFAULTS = {"numeric": {"integer": False, "impute": "none", "transform": "none"}, "split": {"last_weeks": None}}


def _without_later_defaults(recipe: dict) -> dict:
    for column in recipe.get("columns", {}).get("numeric", []):
        for key, default in _LATER_DEFAULTS["numeric"].items():
            if column.get(key, default) == default:
                column.pop(key, None)
    split = recipe.get("split", {})
    for key, default in _LATER_DEFAULTS["split"].items():
        if split.get(key, default) == default:
            split.pop(key, None)
    return recipe


# --- loading ----------------------------------------------------------------------------------------------------


def _field_names(model: type[BaseModel]) -> list[str]:
    return list(model.model_fields)


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """Every pydantic model a field's annotation can hold (through list, Optional, Annotated and unions)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found: list[type[BaseModel]] = []
    for inner in typing.get_args(annotation):
        found.extend(_models_in(inner))
    return found


def _model_at(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    """The model class that holds the key at ``loc`` (for 'did you mean' hints)."""
    model: type[BaseModel] | None = Spec
    pending: list[type[BaseModel]] = []
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        if pending:  # a discriminated union: this part is the tag, e.g. 'fill'
            tagged = [m for m in pending if "kind" in m.model_fields
                      and part in typing.get_args(m.model_fields["kind"].annotation)]
            model, pending = (tagged[0] if tagged else None), []
            if model is not None:
                continue
        if model is None or part not in model.model_fields:
            return None
        options = _models_in(model.model_fields[part].annotation)
        if len(options) == 1:
            model = options[0]
        else:
            model, pending = None, options
    return model


def _key_path(loc: tuple[Any, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part in ("range", "fill", "drop_missing", "order", "nearer"):
            continue
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def format_validation_error(error: ValidationError, path: Path) -> str:
    lines = [f"spec file {path}: {error.error_count()} problem(s)"]
    for item in error.errors():
        loc = tuple(p for p in item["loc"] if not str(p).startswith("function-"))
        key = _key_path(loc)
        if item["type"] == "extra_forbidden":
            model = _model_at(loc)
            hint = ""
            if model is not None:
                close = difflib.get_close_matches(str(loc[-1]), _field_names(model), n=1)
                if close:
                    hint = f" (did you mean '{close[0]}'?)"
            allowed = f"; allowed here: {', '.join(_field_names(model))}" if model is not None else ""
            lines.append(f"  - unknown key '{key}'{hint}{allowed}")
        elif item["type"] == "missing":
            lines.append(f"  - missing required key '{key}'")
        elif item["type"] == BOOL_FOR_NUMBER:
            inner = item["ctx"]["key"]
            full = inner if key == "(top level)" else f"{key}.{inner}"
            lines.append(f"  - key '{full}': takes a number, got the boolean {item['ctx']['value']}")
        else:
            got = item.get("input")
            shown = repr(got) if not isinstance(got, dict) else "a mapping"
            lines.append(f"  - key '{key}': {item['msg']} (got {shown})")
    return "\n".join(lines)


class _DuplicateKey(Exception):
    pass


class _UniqueKeyLoader(yaml.SafeLoader):
    """YAML's safe loader, except that a key written twice in one mapping is an error (YAML 1.2 says keys are
    unique; PyYAML silently keeps the last one, so a repeated section would replace the first)."""

    def construct_mapping(self, node, deep=False):
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=True)
            line = key_node.start_mark.line + 1
            if isinstance(key, typing.Hashable) and key in seen:
                raise _DuplicateKey(f"key {key!r} appears twice in one mapping (lines {seen[key]} and {line}); "
                                    "keep one")
            if isinstance(key, typing.Hashable):
                seen[key] = line
        return super().construct_mapping(node, deep=deep)


def load_spec(path: str | Path) -> Spec:
    """Read and check a spec file. Every problem is reported at once, naming the file and the key."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(f"spec file {path}: not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"spec file {path}: cannot be read ({exc})") from None
    try:
        raw = yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 - a SafeLoader that refuses repeated keys
    except _DuplicateKey as exc:
        raise SpecError(f"spec file {path}: {exc}") from None
    except yaml.YAMLError as exc:
        raise SpecError(f"spec file {path}: not valid YAML ({exc})") from None
    if not isinstance(raw, dict):
        raise SpecError(f"spec file {path}: expected a mapping of keys at the top level, got {type(raw).__name__}")
    try:
        return Spec.model_validate(raw)
    except ValidationError as exc:
        raise SpecError(format_validation_error(exc, path)) from None


def spec_from_dict(raw: dict[str, Any], origin: str = "<dict>") -> Spec:
    try:
        return Spec.model_validate(raw)
    except ValidationError as exc:
        raise SpecError(format_validation_error(exc, Path(origin))) from None


def resolve_source(spec: Spec, spec_path: str | Path) -> str:
    """The source path or glob made absolute against the spec file's folder."""
    source = Path(spec.source.path)
    if not source.is_absolute():
        source = Path(spec_path).resolve().parent / source
    return str(source)
