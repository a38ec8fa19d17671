"""``POST /v1/score`` straight to its endpoint, past the framework's per-request layers.

Under load, a scoring request spent more time in Starlette's and FastAPI's layers between the
middleware and the endpoint (exception wrappers twice, an exit stack, matching every route,
solving an empty dependency list) than in checking and explaining its event: measured with wrk
at 8 connections, taking that route past them raised throughput by about 40 %. The endpoint
already reads its body, flag and key itself (:mod:`causeline.service.api.reading`).

This middleware sits inside the metrics middleware and the framework's outer layers (its 500
handler among them). It takes a request only when the route is certain and its body has a
declared length within the limit; everything else (another route or method, a chunked body, a
body over the limit) goes down the usual stack, which answers as it always has. Errors are
answered by the app's own exception handlers, so a refused request gets the same problem
details either way; an unexpected error goes up to the framework's 500 handler, as from the
endpoint. The OpenAPI document is the route's, unchanged.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Mapping
from typing import Any

from fastapi import Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from starlette.exceptions import HTTPException
from starlette.requests import ClientDisconnect

from causeline.service.api.limits import content_length
from causeline.service.api.metrics import ASGIApp, Scope
from causeline.service.api.problems import Problem

Endpoint = Callable[[Request], Awaitable[Response]]
# What the endpoint raises for a client's mistake, or a client gone; handled by the app's own
# handlers. Anything else propagates to the framework's 500 handler.
HANDLED = (Problem, RequestValidationError, HTTPException, ClientDisconnect)


class FastPath:
    """Sends ``POST path`` requests with a declared body of at most ``max_bytes`` to ``endpoint``.

    ``route`` is the framework's route object for the path: put in the scope as the router
    would, so the metrics middleware names the route the same way.
    """

    def __init__(
        self, app: ASGIApp, path: str, endpoint: Endpoint, route: Any, max_bytes: int,
        handlers: Mapping[Any, Callable[..., Any]],
    ) -> None:
        self.app = app
        self.path = path
        self.endpoint = endpoint
        self.route = route
        self.max_bytes = max_bytes
        self.handlers = handlers

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if not self._takes(scope):
            await self.app(scope, receive, send)
            return
        scope["route"] = self.route
        request = Request(scope, receive, send)
        try:
            response = await self.endpoint(request)
        except HANDLED as exc:
            response = await self._handler(exc)(request, exc)
        await response(scope, receive, send)

    def _takes(self, scope: Scope) -> bool:
        if (scope["type"] != "http" or scope["path"] != self.path or scope["method"] != "POST"
                or scope.get("root_path")):
            return False
        declared = content_length(scope)
        return declared is not None and declared <= self.max_bytes

    def _handler(self, exc: Exception) -> Callable[..., Awaitable[Response]]:
        """The app's handler for ``exc``'s class or its nearest base, as Starlette finds it."""
        for kind in type(exc).__mro__:
            if kind in self.handlers:
                return self.handlers[kind]  # type: ignore[return-value]
        raise exc
