"""A scikit-learn transformer that replaces category columns by the vectors of one registered version."""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
import pandas as pd
from scipy.sparse import issparse
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils._set_output import _get_output_config
from sklearn.utils.validation import _check_feature_names_in, check_is_fitted, validate_data

from entivec.tasks.apply.lookup import (
    DEFAULT_UNKNOWN,
    CategoryTypeError,
    category_type_problem,
    check_unknown_rule,
    column_report,
    pandas_kind,
    prepare,
)

# scikit-learn's estimator checks that feed unnamed numeric arrays (rows of floats or integer codes). The encoder
# finds its category columns by name, so each fails with the one clear "needs a pandas DataFrame" TypeError;
# tests/test_transformer.py runs their DataFrame counterparts and checks that each fails for this reason only.
_NEEDS_A_DATAFRAME = (
    "feeds an unnamed numeric array: VectorEncoder finds its category columns by name and needs a pandas DataFrame"
)
EXPECTED_FAILED_CHECKS = {
    name: _NEEDS_A_DATAFRAME
    for name in (
        "check_complex_data", "check_dict_unchanged", "check_dont_overwrite_parameters", "check_dtype_object",
        "check_estimators_dtypes", "check_estimators_empty_data_messages", "check_estimators_fit_returns_self",
        "check_estimators_overwrite_params", "check_estimators_pickle", "check_f_contiguous_array_estimator",
        "check_fit1d", "check_fit2d_1feature", "check_fit2d_1sample", "check_fit2d_predict1d",
        "check_fit_check_is_fitted", "check_fit_idempotent", "check_fit_score_takes_y",
        "check_methods_sample_order_invariance", "check_methods_subset_invariance", "check_n_features_in",
        "check_n_features_in_after_fitting", "check_pipeline_consistency", "check_positive_only_tag_during_fit",
        "check_readonly_memmap_input", "check_transformer_data_not_an_array", "check_transformer_general",
    )
}


def expected_failed_checks(estimator: VectorEncoder | None = None) -> dict[str, str]:
    """The scikit-learn estimator checks VectorEncoder is expected to fail, with the reason, for
    ``sklearn.utils.estimator_checks.check_estimator(..., expected_failed_checks=...)`` and
    ``parametrize_with_checks(..., expected_failed_checks=expected_failed_checks)``."""
    return dict(EXPECTED_FAILED_CHECKS)


class VectorEncoder(TransformerMixin, BaseEstimator):
    """Replace high-cardinality category columns by the entity-embedding vectors of a registered version.

    Entity embeddings (Guo & Berkhahn, "Entity Embeddings of Categorical Variables", arXiv:1604.06737,
    2016) map each category of a column to a learned vector; downstream models then use the vector
    components as ordinary numeric features. This transformer reads one registered version of a vector
    set from the entivec registry and does the mapping inside any scikit-learn ``Pipeline``.

    ``fit`` resolves ``version`` once: an alias such as ``"production"`` becomes a fixed version number
    (``version_``) whose vocabularies and vectors are kept in the fitted object. A fitted pipeline therefore
    keeps giving the same features after the alias moves to another version; refit it to follow the alias.
    ``fit`` learns nothing from the rows of ``X`` beyond its column names (``y`` is ignored).

    Caution: vectors of places (postcodes, depots, stores) can stand in for protected attributes of the
    people who live or shop there; check downstream models for that as you would for the raw column.

    Parameters
    ----------
    model_name : str
        Registered model name whose vector set is used.
    version : str or int, default="production"
        A version number (``3`` or ``"v3"``) or an alias (``"staging"``, ``"production"``).
    columns : list of str or None, default=None
        Category columns to replace. ``None`` means every column of the vector set that ``X`` has.
    unknown : {"unknown_row", "zeros", "mean", "error"}, default="unknown_row"
        What a value outside the vocabulary (unseen, too rare in training, or missing) gets: the trained
        unknown row, a zero vector, the frequency-weighted mean of the known vectors, or an error. The same
        rule, implemented once in ``entivec.tasks.apply.lookup``, serves the batch job and the served model.
    drop : bool, default=True
        Replace each category column by its vector components (True) or keep it before them (False).
    tracking_uri : str or None, default=None
        MLflow tracking URI of the registry; ``None`` means entivec's configured store
        (``MLFLOW_TRACKING_URI``, else the SQLite store in the project folder).

    Attributes
    ----------
    version_ : str
        The version number the alias resolved to at ``fit``.
    run_id_ : str
        MLflow run that produced that version.
    columns_ : list of str
        The category columns replaced, in the order of ``X``.
    vocabularies_ : dict of str -> Vocabulary
        Vocabulary per column (id 0 is the unknown id).
    vectors_ : dict of str -> ndarray of shape (n_categories, dimension)
        The registered vectors per column, row 0 being the trained unknown row.
    unknown_share_ : dict of str -> float
        Share of the fitting rows, per column, that met the unknown-category rule.
    feature_names_in_ : ndarray of str
        Column names of ``X`` at ``fit``.
    n_features_in_ : int
        Number of columns of ``X`` at ``fit``.

    Notes
    -----
    Output columns follow the input order; a replaced column ``c`` becomes ``c__vec0 … c__vec{d-1}``
    (float32). Other columns pass through unchanged. ``X`` must be a pandas DataFrame (the vector set
    names its columns). Category columns hold text, integers or booleans; a numeric type the vocabulary
    cannot match is refused rather than silently mapped to the unknown row. ``unknown_report(X)`` tells
    how many rows of ``X`` met the rule and which unseen categories were most frequent.

    Inside a ``ColumnTransformer``, give it only the category columns it has vectors for; other text
    columns go to another step (or ``remainder="passthrough"`` for numbers). scikit-learn's estimator checks
    that feed unnamed numeric arrays are declared in :func:`expected_failed_checks`.

    Examples
    --------
    After ``entivec demo`` has registered the invented ``depot-demand`` vectors (alias ``staging``):

    >>> import pandas as pd
    >>> from sklearn.linear_model import Ridge
    >>> from sklearn.pipeline import make_pipeline
    >>> from entivec.transformer import VectorEncoder
    >>> rows = pd.DataFrame({
    ...     "depot": ["ESK-138", "DUN-054", "a depot never seen"],
    ...     "product_family": ["family-03", "family-11", None],
    ...     "return_count": [0, 2, 1],
    ... })
    >>> encoder = VectorEncoder(model_name="depot-demand", version="staging", unknown="mean")
    >>> pipeline = make_pipeline(encoder, Ridge()).fit(rows, [31.0, 55.0, 40.0])  # doctest: +SKIP
    >>> pipeline[0].version_  # fixed from now on, wherever 'staging' moves  # doctest: +SKIP
    '1'
    >>> pipeline[0].get_feature_names_out()[:3]  # doctest: +SKIP
    array(['depot__vec0', 'depot__vec1', 'depot__vec2'], dtype=object)
    >>> pipeline[0].unknown_report(rows)[["unknown", "missing", "unseen"]]  # doctest: +SKIP
                    unknown  missing  unseen
    column
    depot                 1        0       1
    product_family        1        1       0
    """

    def __init__(
        self,
        model_name: str | None = None,
        version: str | int = "production",
        columns: list[str] | None = None,
        unknown: str = DEFAULT_UNKNOWN,
        drop: bool = True,
        tracking_uri: str | None = None,
    ):
        self.model_name = model_name
        self.version = version
        self.columns = columns
        self.unknown = unknown
        self.drop = drop
        self.tracking_uri = tracking_uri

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.string = True
        tags.input_tags.categorical = True
        tags.input_tags.allow_nan = True  # a missing category is a value like any other: it meets the rule
        tags.requires_fit = True
        tags.target_tags.required = False
        tags.transformer_tags.preserves_dtype = []  # vectors are float32 whatever came in
        return tags

    # --- learning (from the registry, not from rows) ------------------------------------------------------

    def fit(self, X: pd.DataFrame, y=None) -> VectorEncoder:
        """Resolve the version, load its vocabularies and vectors, and check ``X``'s category columns."""
        from entivec.tasks.lifecycle import registry

        check_unknown_rule(self.unknown)
        if not self.model_name:
            raise ValueError("VectorEncoder needs model_name: the registered model whose vectors to use")
        frame = _as_frame(X, "fit")
        validate_data(self, X=frame, reset=True, skip_check_array=True)
        with _tracking_store(self.tracking_uri):
            loaded = registry.load_version(self.model_name, self.version)
        vector_set = loaded.vector_set
        columns = self._chosen_columns(frame, vector_set.columns)
        self.version_ = loaded.version
        self.run_id_ = loaded.run_id
        self.columns_ = columns
        self.vocabularies_ = {c: vector_set.vocabularies[c] for c in columns}
        self.vectors_ = {c: vector_set.vectors[c] for c in columns}
        self._lookups = prepare(vector_set, columns, self.unknown)  # the version's shrink rule included
        self.unknown_share_ = {c: report["unknown_share"] for c, report in self._reports(frame).items()}
        return self

    def _chosen_columns(self, frame: pd.DataFrame, known: list[str]) -> list[str]:
        present = [str(c) for c in frame.columns]
        if self.columns is None:
            chosen = [c for c in present if c in known]
            if not chosen:
                raise ValueError(
                    f"X has none of the columns of {self.model_name!r} version {self.version!r} "
                    f"({', '.join(known)}); X has: {', '.join(present)}"
                )
            return chosen
        wanted = [self.columns] if isinstance(self.columns, str) else list(self.columns)
        for col in wanted:
            if col not in known:
                raise ValueError(
                    f"column {col!r} has no vectors in {self.model_name!r} version {self.version!r}; "
                    f"it has: {', '.join(known)}"
                )
            if col not in present:
                raise ValueError(f"column {col!r} is not in X; X has: {', '.join(present)}")
        return [c for c in present if c in wanted]  # input order, like the output

    # --- applying ------------------------------------------------------------------------------------------

    def transform(self, X: pd.DataFrame):
        """Replace the category columns by their vectors; other columns pass through unchanged."""
        check_is_fitted(self)
        frame = _as_frame(X, "transform")
        validate_data(self, X=frame, reset=False, skip_check_array=True)
        pieces = []
        for col in frame.columns:
            lookup = self._lookups.get(col)
            if lookup is None:
                pieces.append(frame[[col]])
                continue
            values = self._category_values(frame, col)
            ids = lookup.ids(values)
            lookup.check_known(ids, values)
            if not self.drop:
                pieces.append(frame[[col]])
            pieces.append(pd.DataFrame(lookup.vectors(ids).T, columns=lookup.names, index=frame.index, copy=False))
        out = pd.concat(pieces, axis=1) if len(pieces) > 1 else pieces[0]
        if _get_output_config("transform", self)["dense"] == "default":
            return out.to_numpy()
        return out

    def _category_values(self, frame: pd.DataFrame, col: str) -> pd.Series:
        values = frame[col]
        problem = category_type_problem(pandas_kind(values.dtype), str(values.dtype), self._lookups[col].vocabulary)
        if problem:
            raise CategoryTypeError(f"column {col!r} {problem}")
        return values

    def get_feature_names_out(self, input_features=None) -> np.ndarray:
        """Input names with each replaced column expanded into ``<column>__vec<i>``."""
        check_is_fitted(self)
        names = _check_feature_names_in(self, input_features)
        out: list[str] = []
        for name in names:
            lookup = self._lookups.get(str(name))
            if lookup is None:
                out.append(str(name))
                continue
            if not self.drop:
                out.append(str(name))
            out.extend(lookup.names)
        return np.asarray(out, dtype=object)

    def unknown_report(self, X: pd.DataFrame) -> pd.DataFrame:
        """Per replaced column of ``X``: rows, rows that met the unknown rule, missing, unseen, top unseen."""
        check_is_fitted(self)
        frame = _as_frame(X, "unknown_report")
        rows = list(self._reports(frame).values())
        return pd.DataFrame(rows).set_index("column")

    def _reports(self, frame: pd.DataFrame) -> dict[str, dict]:
        out = {}
        for col in self.columns_:
            if col not in frame.columns:
                raise ValueError(f"column {col!r} is not in X; X has: {', '.join(map(str, frame.columns))}")
            values = self._category_values(frame, col)
            lookup = self._lookups[col]
            out[col] = column_report(lookup, values, lookup.ids(values)).as_dict()
        return out


def _as_frame(X, method: str) -> pd.DataFrame:
    if isinstance(X, pd.DataFrame):
        return X
    if issparse(X):
        raise TypeError(
            f"VectorEncoder.{method} does not support sparse input: pass a pandas DataFrame of category columns"
        )
    raise TypeError(
        f"VectorEncoder.{method} needs a pandas DataFrame: the vector set finds its columns by name, "
        f"and a {type(X).__name__} has no column names"
    )


@contextmanager
def _tracking_store(uri: str | None) -> Iterator[None]:
    """Point entivec's registry at ``uri`` for the duration of a load; the configured store otherwise."""
    if uri is None:
        yield
        return
    # MLflow exports the registry URI beside the tracking one when the registry client is made: restore both
    names = ("MLFLOW_TRACKING_URI", "MLFLOW_REGISTRY_URI")
    before = {name: os.environ.get(name) for name in names}
    os.environ["MLFLOW_TRACKING_URI"] = uri
    try:
        yield
    finally:
        for name, value in before.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value
