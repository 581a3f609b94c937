"""The dataset spec: one YAML file describes a dataset, its cleaning rules and how to train and judge vectors."""

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
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from entivec.schemas.promotion import PromotionSpec

SPEC_VERSION = 1
MODEL_NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,127}$"


class SpecError(ValueError):
    """A spec file that cannot be used; the message names the file, the key and what was expected."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


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
    name: str
    min: float | None = None
    max: float | None = None
    nullable: bool = False

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
    method: Literal["random", "time"] = "random"
    test_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.2
    seed: int = 0
    time_column: str | None = None
    cutoff: str | None = Field(None, description="Rows at or after this time are held out.")

    @model_validator(mode="after")
    def _time_needs_column(self) -> SplitSpec:
        if self.method == "time" and (self.time_column is None or self.cutoff is None):
            raise ValueError("a time split needs time_column and cutoff")
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
    # Defaults chosen by measurement (benchmarks/bench_evidence.py, README "What the evidence costs"): on a
    # 1 M-row table the evaluation costs no more than the vector training. Three folds of a 150,000-row sample
    # cost 300,000 network rows per epoch against 800,000 for five folds of 200,000; histogram gradient boosting
    # fitted 20,000 rows in 1.5 s where a 100-tree random forest took 19-25 s with a worse RMSE; the linear
    # model adds a second, cheap model family. Random forest stays available by name. With 20,000 downstream and
    # 50,000 test rows the downstream models alone took 38 s against 49 s of training, hence 10,000 and 20,000
    # (and native categorical splits for gradient boosting's one-hot set, tasks/evidence/downstream.py).
    folds: Annotated[int, Field(ge=2, le=20)] = 3
    models: list[Literal["random_forest", "hist_gradient_boosting", "linear"]] = [
        "hist_gradient_boosting",
        "linear",
    ]
    onehot_max_categories: Annotated[int, Field(ge=2)] = 64
    # Rows the downstream models train on (a seeded sample of the training rows) and are scored on (of the test
    # rows), and rows the fold networks train on: caps, so the evidence stops growing with the table.
    max_train_rows: Annotated[int, Field(ge=100)] | None = 10_000
    max_test_rows: Annotated[int, Field(ge=100)] | None = 20_000
    max_fold_rows: Annotated[int, Field(ge=100)] | None = 150_000
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
    id_column: str
    target: TargetSpec
    columns: ColumnsSpec
    rules: list[Rule] = []
    split: SplitSpec = SplitSpec()
    training: TrainingSpec = TrainingSpec()
    evaluation: EvaluationSpec = EvaluationSpec()
    promotion: PromotionSpec = PromotionSpec()
    shrink: ShrinkSpec = ShrinkSpec()
    drift: DriftSpec = DriftSpec()

    @model_validator(mode="after")
    def _columns_consistent(self) -> Spec:
        roles: dict[str, str] = {self.id_column: "id_column", self.target.column: "target.column"}
        if self.id_column == self.target.column:
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
        return self

    # convenience -----------------------------------------------------------------------------------------------
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

        The ``drift`` section is left out: its thresholds decide whether a retrain runs, not what it makes, and
        specs written before it existed keep their hash.
        """
        recipe = self.model_dump(mode="json", exclude={"drift"})
        canonical = json.dumps(recipe, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canonical.encode()).hexdigest()


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
        else:
            got = item.get("input")
            shown = repr(got) if not isinstance(got, dict) else "a mapping"
            lines.append(f"  - key '{key}': {item['msg']} (got {shown})")
    return "\n".join(lines)


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
        raw = yaml.safe_load(text)
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
