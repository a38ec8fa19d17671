"""What every spec model shares: strict parsing, and errors that name the key."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, TypeVar

from pydantic import BaseModel, ConfigDict, ValidationError

from causeline.service.errors import ConfigError

NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"


class Strict(BaseModel):
    """Base for spec models: unknown keys are errors, instances are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


M = TypeVar("M", bound=BaseModel)


def validate_model(model: type[M], data: Any, source: str) -> M:
    """Validate ``data`` as ``model`` or raise a one-line :class:`ConfigError` naming the key."""
    if not isinstance(data, Mapping):
        raise ConfigError(f"{source}: expected a mapping at the top level")
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        location = _location(first.get("loc", ()))
        message = first.get("msg", "invalid").removeprefix("Value error, ")
        extra = f" (and {exc.error_count() - 1} more)" if exc.error_count() > 1 else ""
        if first.get("type") == "extra_forbidden":
            message = "unknown key"
        where = f" at {location}" if location else ""
        raise ConfigError(f"{source}{where}: {message}{extra}") from None


def _location(parts: tuple[Any, ...]) -> str:
    text = ""
    for part in parts:
        if isinstance(part, int):
            text += f"[{part}]"
        else:
            text += f".{part}" if text else str(part)
    return text
