"""The base of every spec section: unknown keys, booleans where numbers belong and NaN/inf are errors.

YAML reads `true` as a boolean and pydantic would quietly take it as the number 1 (`epochs: true` meant one
epoch); `.nan` passes a comparison with every bound and would quarantine every row. Both are refused here, in
one place, for every section.
"""

from __future__ import annotations

import types
import typing
from typing import Any

from pydantic import BaseModel, ConfigDict, model_validator
from pydantic_core import PydanticCustomError

BOOL_FOR_NUMBER = "bool_for_number"


def _admits_bool(annotation: Any) -> bool:
    """Whether a field's annotation can hold a boolean (bool itself, Any, or a union / Annotated / list of it)."""
    if annotation is bool or annotation is Any:
        return True
    origin = typing.get_origin(annotation)
    if origin is typing.Literal:
        return any(isinstance(v, bool) for v in typing.get_args(annotation))
    if origin in (typing.Union, types.UnionType, typing.Annotated, list, tuple, set, dict):
        return any(_admits_bool(a) for a in typing.get_args(annotation))
    return isinstance(annotation, type) and issubclass(annotation, BaseModel)  # its own check runs inside


def _admits_number(annotation: Any) -> bool:
    if annotation in (int, float):
        return True
    origin = typing.get_origin(annotation)
    if origin in (typing.Union, types.UnionType, typing.Annotated):
        return any(_admits_number(a) for a in typing.get_args(annotation))
    return False


class Strict(BaseModel):
    """A spec section: extra keys forbidden, frozen, finite numbers only, no booleans for numbers."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    @model_validator(mode="before")
    @classmethod
    def _no_booleans_for_numbers(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        for key, value in data.items():
            field = cls.model_fields.get(key) if isinstance(key, str) else None
            if field is None or not isinstance(value, bool):
                continue
            if _admits_number(field.annotation) and not _admits_bool(field.annotation):
                raise PydanticCustomError(
                    BOOL_FOR_NUMBER, "key '{key}' takes a number, got the boolean {value}",
                    {"key": key, "value": str(value).lower()},
                )
        return data
