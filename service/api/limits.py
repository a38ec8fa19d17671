"""The request-body size limit, enforced before any of the body is parsed.

A declared ``Content-Length`` over the limit is refused at once (within it, the server reads no
more than declared); a chunked body is read up to the limit and refused when it goes past it, so a
client can never make the server buffer more than ``max_bytes``.
"""

from __future__ import annotations

from typing import Any

from causeline.service.api.metrics import ASGIApp, Message, Scope
from causeline.service.api.problems import problem_response


class BodyLimitMiddleware:
    """Answers 413 problem details for bodies over ``max_bytes``."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope["method"] in {"GET", "HEAD", "OPTIONS"}:
            await self.app(scope, receive, send)
            return
        declared = content_length(scope)
        if declared is not None and declared > self.max_bytes:
            await self._refuse(scope, receive, send)
            return
        if declared is not None:
            # The server reads no more than a declared length (h11 refuses a longer body),
            # so there is nothing to count: pass the body through unbuffered.
            await self.app(scope, receive, send)
            return
        body, more = bytearray(), True
        while more:
            message = await receive()
            if message["type"] != "http.request":
                await self.app(scope, _replay([message]), send)  # a disconnect: pass it on
                return
            body += message.get("body", b"")
            more = message.get("more_body", False)
            if len(body) > self.max_bytes:
                await self._refuse(scope, receive, send)
                return
        await self.app(scope, _replay([{"type": "http.request", "body": bytes(body)}], receive),
                       send)

    async def _refuse(self, scope: Scope, receive: Any, send: Any) -> None:
        response = problem_response(
            413, f"the request body is over the limit of {self.max_bytes} bytes",
            "body-too-large", headers={"Connection": "close"},
        )
        await response(scope, receive, send)


def content_length(scope: Scope) -> int | None:
    """The request's declared Content-Length, or None (absent or not a number)."""
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


def _replay(messages: list[Message], then: Any = None) -> Any:
    """A ``receive`` that hands out ``messages`` first, then defers to ``then``."""
    queue = list(messages)

    async def receive() -> Message:
        if queue:
            return queue.pop(0)
        if then is not None:
            return await then()
        return {"type": "http.disconnect"}

    return receive
