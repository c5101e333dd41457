"""pydantic's validation errors as :class:`~compiler.errors.Problem` lines a person can act on.

A pydantic location runs through the tagged-union member names (``sgd``, ``widths``) the user
never wrote; :func:`pydantic_problems` takes them out, so the loader can find the key's line, and
rewords each message to say what was expected and what was given (with a suggestion for a
misspelt key). A cross-table rule raises ``@dotted.key: message`` lines; each becomes its own
problem at its key.
"""

from __future__ import annotations

import difflib
import json
import typing
from typing import Any

from pydantic import BaseModel, ValidationError

from compiler.errors import Problem
from compiler.paths import models_in
from compiler.spec import Spec

__all__ = ["pydantic_problems"]


def pydantic_problems(err: ValidationError, prefix: tuple = ()) -> list[Problem]:
    """One Problem per pydantic error, with the tagged-union member names taken out of the path."""
    problems = []
    for e in err.errors(include_url=False):
        _, loc = _walk(e["loc"])
        message = _message(e, loc)
        if e["type"] == "union_tag_invalid":
            loc += ("kind",)  # the wrong value is written on the kind line, not on the table
        if message.startswith("@"):
            for line in message.splitlines():
                key, _, text = line[1:].partition(": ")
                # A digit is a list index ("blocks.2" is model.blocks[2]): no key is all digits.
                parts = tuple(int(part) if part.isdigit() else part for part in key.split("."))
                problems.append(Problem(prefix + loc + parts, text))
        else:
            problems.append(Problem(prefix + loc, message))
    return problems


def _walk(raw_loc) -> tuple[list[type[BaseModel]], tuple]:
    """Follow a pydantic error location through the spec models: the models it ends in and the
    location as the user wrote it (union tags such as 'sgd' or 'widths' removed)."""
    models: list[type[BaseModel]] = [Spec]
    loc: list = []
    for part in raw_loc:
        if isinstance(part, int):
            loc.append(part)
            continue
        fields = [m.model_fields[part] for m in models if part in m.model_fields]
        if fields:
            loc.append(part)
            models = [x for f in fields for x in (models_in(f.annotation) or _list_models(f.annotation))]
            continue
        tagged = [m for m in models if part in _tags_of(m)]
        if tagged:
            models = tagged
        elif not part.startswith(("list[", "constrained-", "function-", "widths", "budget", "dict[")):
            loc.append(part)
    return models, tuple(loc)


def _tags_of(model: type[BaseModel]) -> set[str]:
    kind = model.model_fields.get("kind")
    tags = set(typing.get_args(kind.annotation)) if kind is not None else set()
    return tags | {model.__name__}


def _message(e: dict, loc: tuple) -> str:
    kind = e["type"]
    got = e.get("input")
    if kind == "extra_forbidden":
        name = loc[-1] if loc else "?"
        parent = _walk(e["loc"][:-1])[0]
        choices = sorted({f for m in parent for f in m.model_fields})
        close = difflib.get_close_matches(str(name), choices, n=1, cutoff=0.5)
        hint = f"; did you mean '{close[0]}'?" if close else (f" (expected one of: {', '.join(choices)})" if choices else "")
        return f"unknown key '{name}'{hint}"
    if kind == "missing":
        return "required key is missing"
    if kind == "union_tag_invalid":
        ctx = e.get("ctx", {})
        return f"unknown kind {ctx.get('tag')!r} (expected one of {ctx.get('expected_tags')})"
    if kind == "union_tag_not_found":
        return "a 'kind' key is required here (it selects which variant of this section you mean)"
    msg = e["msg"]
    if msg.startswith("Value error, "):
        msg = msg[len("Value error, "):]
    if kind.endswith("_type") or kind in ("literal_error", "model_type", "model_attributes_type"):
        return f"{msg[0].lower() + msg[1:]} (got {_short(got)})"
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal", "finite_number",
                "string_pattern_mismatch", "too_short", "too_long", "string_too_long", "string_too_short"):
        return f"{msg[0].lower() + msg[1:]} (got {_short(got)})"
    return msg[0].lower() + msg[1:] if msg else kind


def _short(value: Any) -> str:
    text = repr(value) if not isinstance(value, (dict, list)) else json.dumps(value, default=str)[:60]
    return text if len(text) <= 60 else text[:57] + "..."


def _list_models(annotation) -> list[type[BaseModel]]:
    origin = typing.get_origin(annotation)
    if origin is typing.Annotated:
        return _list_models(typing.get_args(annotation)[0])
    if origin is list:
        return models_in(typing.get_args(annotation)[0])
    return []
