"""The spec's optional `review:` section: what the review page of a version shows beyond the vectors themselves.

``groups`` names, per embedded column, a column of the data whose most frequent value for each category colours
that category on the page's map (for example depots coloured by region). ``neighbours`` is how many nearest
neighbours the page lists per category. Nothing here changes what a train run makes, so the section is left
out of ``Spec.content_hash``.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field


class ReviewSpec(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    groups: dict[str, str] = Field({}, description="Embedded column -> data column that colours its categories.")
    neighbours: Annotated[int, Field(ge=1, le=50)] = 10
