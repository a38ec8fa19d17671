"""Dependencies of the routes: the app's state, and API keys (FastAPI security schemes, so the
OpenAPI document shows them).
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Request, Security
from fastapi.security import HTTPAuthorizationCredentials

from causeline.service.api.auth import api_key_header, bearer, presented_keys
from causeline.service.api.problems import Problem
from causeline.service.api.state import Service


def service_of(request: Request) -> Service:
    """The app's state."""
    return request.app.state.service  # type: ignore[no-any-return]


def check_key(request: Request, service: Service | None = None) -> None:
    """A valid key when keys are configured (401 without one, 403 with a wrong one)."""
    keys = (service or service_of(request)).keys
    if keys.enabled:
        keys.check(presented_keys(request))


async def require_key(
    request: Request,
    _bearer: Annotated[HTTPAuthorizationCredentials | None, Security(bearer)],
    _header: Annotated[str | None, Security(api_key_header)],
) -> None:
    """Every endpoint but health and scoring (which call :func:`check_key` themselves).

    A coroutine, though it awaits nothing: FastAPI runs plain functions in a thread pool, and
    that hop cost more than the check itself on every request.
    """
    check_key(request)


async def require_admin(
    request: Request,
    _bearer: Annotated[HTTPAuthorizationCredentials | None, Security(bearer)],
    _header: Annotated[str | None, Security(api_key_header)],
) -> None:
    """Admin endpoints: a valid key always; with no keys only when explicitly allowed."""
    keys = service_of(request).keys
    check_key(request)
    if not keys.enabled and not keys.admin_without_keys:
        raise Problem(
            403, "admin endpoints need API keys (CAUSELINE_API_KEYS); or set "
            "CAUSELINE_ADMIN_WITHOUT_KEYS=1 on a trusted network", "admin-disabled",
        )
