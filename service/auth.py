"""Optional API keys: ``Authorization: Bearer <key>`` or ``X-API-Key: <key>``.

Keys come from ``CAUSELINE_API_KEYS`` (comma-separated) and/or ``CAUSELINE_API_KEYS_FILE`` (one
per line, ``#`` comments). With no keys the API is open, which suits the local demo; admin
endpoints still refuse unless explicitly allowed, so an open demo cannot be reconfigured.
Every key is compared in constant time (``hmac.compare_digest``) so timing leaks nothing.
"""

from __future__ import annotations

import hmac
from pathlib import Path

from fastapi import Request
from fastapi.security import APIKeyHeader, HTTPBearer

from service.errors import ConfigError
from service.problems import Problem

bearer = HTTPBearer(auto_error=False, description="an API key as a bearer token")
api_key_header = APIKeyHeader(name="X-API-Key", auto_error=False, description="an API key")
_CHALLENGE = {"WWW-Authenticate": 'Bearer realm="causeline"'}


class ApiKeys:
    """The accepted keys; ``enabled`` is False when there are none."""

    def __init__(self, keys: list[str], admin_without_keys: bool = False) -> None:
        self._keys = [key.encode("utf-8") for key in keys]
        self.admin_without_keys = admin_without_keys

    @classmethod
    def load(cls, keys: str | None, file: Path | None, admin_without_keys: bool) -> ApiKeys:
        found = [key.strip() for key in (keys or "").split(",") if key.strip()]
        if file is not None:
            try:
                text = Path(file).read_text("utf-8")
            except (OSError, UnicodeDecodeError) as exc:
                raise ConfigError(f"CAUSELINE_API_KEYS_FILE: cannot read {file} ({exc})") from None
            found += [
                line.strip() for line in text.splitlines()
                if line.strip() and not line.lstrip().startswith("#")
            ]
            if not found:
                raise ConfigError(f"CAUSELINE_API_KEYS_FILE: {file} holds no key")
        return cls(found, admin_without_keys)

    @property
    def enabled(self) -> bool:
        return bool(self._keys)

    def matches(self, candidate: str) -> bool:
        given = candidate.encode("utf-8")
        # Compare against every key, so the time taken does not tell which one matched.
        results = [hmac.compare_digest(given, key) for key in self._keys]
        return any(results)

    def check(self, presented: str | None) -> None:
        """Raise 401 when no key was sent and 403 when it is not one of ours."""
        if presented is None or not presented.strip():
            raise Problem(401, "send an API key: Authorization: Bearer <key>", "unauthorized",
                          headers=_CHALLENGE)
        if not self.matches(presented.strip()):
            raise Problem(403, "the API key is not valid", "forbidden")


def presented_key(request: Request) -> str | None:
    """The key from ``Authorization: Bearer`` or ``X-API-Key``, whichever was sent."""
    header = request.headers.get("authorization")
    if header:
        scheme, _, value = header.partition(" ")
        if scheme.lower() == "bearer":
            return value
        return ""  # another scheme: treated as a wrong key rather than a missing one
    return request.headers.get("x-api-key")
