"""What every spec model shares: strict parsing, and errors that name the key."""

from __future__ import annotations

import difflib
import typing
from collections.abc import Mapping
from typing import Any, TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError

from causeline.service.errors import ConfigError

NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"


class Strict(BaseModel):
    """Base for spec models: unknown keys are errors, instances are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


M = TypeVar("M", bound=BaseModel)


def validate_model(model: type[M], data: Any, source: str, at: str = "") -> M:
    """Validate ``data`` as ``model`` or raise a one-line :class:`ConfigError` naming the key.

    An unknown key names the keys that are valid there, closest first; a section that is not a
    mapping says so and lists its keys. Messages never show the models' class names. ``at``
    names where ``data`` sits in a larger file (say ``timeline``).
    """
    if not isinstance(data, Mapping):
        raise ConfigError(f"{source}: expected a mapping " + (f"at {at}" if at else
                                                               "at the top level"))
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        loc = tuple(first.get("loc", ()))
        location = _location(((at,) if at else ()) + loc)
        message = first.get("msg", "invalid").removeprefix("Value error, ")
        extra = f" (and {exc.error_count() - 1} more)" if exc.error_count() > 1 else ""
        kind = first.get("type")
        if kind == "extra_forbidden":
            keys = _keys_at(model, loc[:-1])
            message = f"unknown key {str(loc[-1])!r}" + _valid(str(loc[-1]), keys)
        elif kind in ("model_type", "model_attributes_type", "dict_type"):
            keys = _keys_at(model, loc)
            message = "expected a mapping" + (f" with keys {', '.join(keys)}" if keys else "")
        where = f" at {location}" if location else ""
        raise ConfigError(f"{source}{where}: {message}{extra}") from None


def _valid(key: str, keys: list[str]) -> str:
    """'; did you mean ...? valid keys: ...' for an unknown key."""
    if not keys:
        return ""
    close = difflib.get_close_matches(key, keys, n=1, cutoff=0.5)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return f"{hint}; valid keys here: {', '.join(keys)}"


def _keys_at(model: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    """The field names of the model found by following ``loc`` from ``model`` (or none)."""
    current: Any = model
    for part in loc:
        current = _inner(current)
        if isinstance(part, int):
            args = [a for a in typing.get_args(current) if a is not Ellipsis]
            current = args[0] if args else None
        elif isinstance(current, type) and issubclass(current, BaseModel):
            field = current.model_fields.get(str(part))
            current = field.annotation if field is not None else None
        else:
            return []
    current = _inner(current)
    if isinstance(current, type) and issubclass(current, BaseModel):
        return list(current.model_fields)
    return []


def _inner(annotation: Any) -> Any:
    """A model class out of ``X | None``; containers are left for the caller to open."""
    args = typing.get_args(annotation)
    if args and type(None) in args:
        rest = [a for a in args if a is not type(None)]
        return rest[0] if len(rest) == 1 else annotation
    return annotation


def _location(parts: tuple[Any, ...]) -> str:
    text = ""
    for part in parts:
        if isinstance(part, int):
            text += f"[{part}]"
        else:
            text += f".{part}" if text else str(part)
    return text
