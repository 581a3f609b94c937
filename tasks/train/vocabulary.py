"""Build the vocabulary of every embedded column from the training rows, optionally extending earlier ones."""

from __future__ import annotations

import pandas as pd
from prefect import task

from entivec.schemas.spec import Spec
from entivec.schemas.vocabulary import Vocabulary


def build_vocabularies(
    train: pd.DataFrame, spec: Spec, previous: dict[str, Vocabulary] | None = None
) -> dict[str, Vocabulary]:
    """One vocabulary per embedded column, from training rows only (held-out rows must not shape it).

    With ``previous`` (the vocabularies of an earlier version), every known category keeps its id and new
    ones are appended; a column new to this spec starts afresh.
    """
    previous = previous or {}
    return {
        col.name: Vocabulary.build(col.name, train[col.name], col.min_count, previous.get(col.name))
        for col in spec.columns.embed
    }


@task(name="build-vocabularies")
def build_vocabularies_task(
    train: pd.DataFrame, spec: Spec, previous: dict[str, Vocabulary] | None = None
) -> dict[str, Vocabulary]:
    return build_vocabularies(train, spec, previous)
