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

from causeline.service.api.problems import Problem
from causeline.service.errors import ConfigError

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

    def check(self, presented: list[str]) -> None:
        """Raise 401 when no key was sent and 403 when any key sent is not one of ours.

        Two different keys in one request (Bearer and ``X-API-Key``) must both be valid: the
        request is not let through on whichever one happens to be checked.
        """
        if not presented:
            raise Problem(401, "send an API key: Authorization: Bearer <key>", "unauthorized",
                          headers=_CHALLENGE)
        if not all(self.matches(key) for key in presented):
            raise Problem(403, "the API key is not valid", "forbidden")


def presented_keys(request: Request) -> list[str]:
    """The keys sent as ``Authorization: Bearer <key>`` and as ``X-API-Key``; empty ones left out.

    An ``Authorization`` header of another scheme (say Basic, set by a proxy in front) is not a
    key of ours and is ignored.
    """
    keys = []
    header = request.headers.get("authorization")
    if header:
        scheme, _, value = header.strip().partition(" ")
        if scheme.lower() == "bearer" and value.strip():
            keys.append(value.strip())
    other = request.headers.get("x-api-key")
    if other and other.strip():
        keys.append(other.strip())
    return keys
