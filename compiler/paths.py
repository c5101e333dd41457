"""Key paths: every dotted key a spec can contain, read off the pydantic models.

An axis key, the schema's list of settable keys and the translation of pydantic's error locations
all walk the same models; they share :func:`models_in` to see through ``Annotated``, unions and
``Optional`` to the tables a field may hold.
"""

from __future__ import annotations

import types
import typing
from typing import Union

from pydantic import BaseModel

from compiler.spec import Spec

__all__ = ["models_in", "field_paths"]


def models_in(annotation) -> list[type[BaseModel]]:
    """The pydantic models an annotation may hold (through Annotated, Union, Optional)."""
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return models_in(typing.get_args(annotation)[0])
    if origin in (Union, types.UnionType):
        return [m for a in typing.get_args(annotation) for m in models_in(a)]
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return []


def field_paths(model: type[BaseModel] = Spec, prefix: str = "") -> set[str]:
    """Every dotted key a spec can contain (union members' fields together)."""
    out = set()
    for name, info in model.model_fields.items():
        path = f"{prefix}{name}"
        out.add(path)
        for sub in models_in(info.annotation):
            out |= field_paths(sub, path + ".")
    return out
