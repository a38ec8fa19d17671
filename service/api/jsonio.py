"""JSON in and out of the scoring path, by pydantic-core's parser and serializer (Rust).

On this project's machine they parse a one-event request in 2 us against 7-11 us for ``json``,
and render its answer in 2 us against 10-14 us; the scoring path does both on every request and
the prediction log renders each record once more. Same rules as ``json``: ``NaN`` and
``Infinity`` tokens parse (the event checks then refuse them by name), integers of any size
stay exact, the last of repeated keys wins. Non-finite floats are written as ``null``, never as
the invalid tokens.
"""

from __future__ import annotations

from typing import Any

import pydantic_core
from fastapi.responses import JSONResponse


def loads(data: bytes | str) -> Any:
    """Parse JSON; raises ``ValueError`` for text that is not JSON."""
    return pydantic_core.from_json(data, allow_inf_nan=True)


def dumps(value: Any) -> bytes:
    """Compact UTF-8 JSON."""
    return pydantic_core.to_json(value, inf_nan_mode="null")


class FastJSONResponse(JSONResponse):
    """A ``JSONResponse`` rendered by :func:`dumps`."""

    def render(self, content: Any) -> bytes:
        return dumps(content)
