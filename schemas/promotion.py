"""The spec's ``promotion:`` section: the gate a version must pass to become `production`, and vector expectations.

Every threshold the gate applies lives here, so a team changes its policy in the spec (and the spec hash
records which policy judged a version). A threshold set to ``null`` switches its check off; the figures
are still measured and reported.

Example::

    promotion:
      judge_model: hist_gradient_boosting
      min_gain_over_baseline: 0.02      # the candidate's loss at least 2% below the no-category baseline
      min_gain_over_production: -0.005  # and not more than 0.5% worse than production (non-inferiority)
      max_drift: 0.6
      expectations:
        - kind: order
          column: clarity
          categories: [I1, SI2, SI1, VS2, VS1, VVS2, VVS1, IF]
        - kind: nearer
          column: clarity
          nearer: [VVS1, VVS2]
          than: [I1, IF]
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, model_validator

from entivec.schemas.strict import Strict

# The same policy as the rest of the spec: unknown keys, booleans for numbers and NaN are errors; frozen once read.
_Strict = Strict


class OrderExpectation(_Strict):
    """These categories of one column should lie along one direction, in the order listed.

    The vectors of the listed categories are projected onto one axis and the Spearman rank correlation of
    the projections with the listed order must reach ``min_rank_correlation``:

    - ``axis: principal`` (default): the first principal component of the listed categories' vectors
      (centred on their mean). Its sign is arbitrary, so the absolute correlation is used: the order may
      run either way along the axis, but it must be this order.
    - ``axis: extremes``: the line from the first listed category's vector to the last one's. The
      direction is fixed by the list, so the signed correlation is used.
    """

    kind: Literal["order"]
    column: str
    categories: list[str] = Field(min_length=3)
    axis: Literal["principal", "extremes"] = "principal"
    min_rank_correlation: Annotated[float, Field(ge=-1, le=1)] = 0.8
    note: str = ""

    @model_validator(mode="after")
    def _distinct(self) -> OrderExpectation:
        if len(set(self.categories)) != len(self.categories):
            raise ValueError("an order expectation lists a category twice")
        return self


class NearerExpectation(_Strict):
    """In one column, the pair ``nearer`` should lie closer together than the pair ``than``."""

    kind: Literal["nearer"]
    column: str
    nearer: tuple[str, str]
    than: tuple[str, str]
    metric: Literal["euclidean", "cosine"] = "euclidean"
    note: str = ""

    @model_validator(mode="after")
    def _pairs(self) -> NearerExpectation:
        if self.nearer[0] == self.nearer[1] or self.than[0] == self.than[1]:
            raise ValueError("each pair of a nearer expectation needs two different categories")
        if set(self.nearer) == set(self.than):
            raise ValueError("the two pairs of a nearer expectation are the same pair")
        return self


Expectation = Annotated[OrderExpectation | NearerExpectation, Field(discriminator="kind")]

Share = Annotated[float, Field(ge=0, le=1)]
Gain = Annotated[float, Field(ge=-1, lt=1)]


class PromotionSpec(_Strict):
    """Thresholds of the promotion gate.

    Downstream: the candidate's vectors, and production's, are judged as fixed features of a scikit-learn
    model (``judge_model``) on held-out rows of the newest data that neither version trained on, beside
    the no-category baseline (numeric and one-hot columns only). The per-row loss (squared error for
    regression, log loss for binary) is compared pairwise and a paired bootstrap percentile interval at
    ``confidence`` is put on the mean difference. A gain passes when the interval's LOWER end is above
    ``min_gain_* x`` the reference's mean loss: 0 asks for a significant improvement, a positive value for
    a margin, a negative value for non-inferiority (not worse than that share).

    ``downstream_fit`` says where the judge model learns:

    - ``held_out_folds`` (default): cross-fitted on the held-out rows themselves (``folds`` folds); each row's
      prediction comes from a model fitted on the other folds. No target of a fitting row ever reached the
      vectors, so nothing leaks; the price is a smaller fitting set.
    - ``training_rows``: fitted on the newest training split, as a team would use the vectors. Those rows'
      targets shaped the vectors, so the model over-trusts them and scores on the held-out rows come out
      lower than they would with out-of-fold vectors: an honest but pessimistic estimate.
    """

    judge_model: Literal["random_forest", "hist_gradient_boosting", "linear"] = "hist_gradient_boosting"
    downstream_fit: Literal["held_out_folds", "training_rows"] = "held_out_folds"
    folds: Annotated[int, Field(ge=2, le=20)] = 5
    compare_encodings: bool = True  # also fit one-hot and target encoding of the embedded columns, for context
    min_gain_over_baseline: Gain = 0.0
    min_gain_over_production: Gain = 0.0
    confidence: Annotated[float, Field(gt=0.5, lt=1)] = 0.95
    bootstrap_resamples: Annotated[int, Field(ge=200, le=200_000)] = 4000
    seed: int = 0
    max_eval_rows: Annotated[int, Field(ge=100)] | None = None
    min_eval_rows: Annotated[int, Field(ge=10)] = 200
    require_unseen_rows: bool = True

    # vector sanity
    max_norm: Annotated[float, Field(gt=0)] = 100.0
    min_norm: Annotated[float, Field(ge=0)] = 0.0
    collapse_tolerance: Annotated[float, Field(gt=0, lt=1)] = 1e-6

    # Stability against production, per embedded column (null switches a check off). Drift is reported but not
    # judged by default: an honest retrain of a weak column can drift by 1 or more (its vectors are mostly
    # noise), so set max_drift from the drift your own retrains show (`entivec diff` reports it).
    max_drift: Annotated[float, Field(gt=0)] | None = None
    neighbours: Annotated[int, Field(ge=1, le=100)] = 10
    min_neighbour_overlap: Share | None = 0.2
    max_dropped_share: Share | None = 0.1
    max_added_share: Share | None = None
    top_movers: Annotated[int, Field(ge=1, le=200)] = 10

    expectations: list[Expectation] = []

    @model_validator(mode="after")
    def _norms(self) -> PromotionSpec:
        if self.min_norm >= self.max_norm:
            raise ValueError(f"min_norm ({self.min_norm}) must be below max_norm ({self.max_norm})")
        return self
