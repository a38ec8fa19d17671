"""Server settings, all from ``CAUSELINE_*`` environment variables (the deploy files set them).

The command line turns its flags into the same variables, so a worker process started by uvicorn
sees exactly what the command line was given.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

from pydantic import Field, ValidationError

from causeline.service.errors import ConfigError
from causeline.service.spec.base import Strict

PREFIX = "CAUSELINE_"
_OFF = {"", "0", "false", "no", "off"}


class Settings(Strict):
    """Everything the HTTP service can be told; field ``x`` comes from ``CAUSELINE_X``."""

    bundle: Path = Path("bundle")
    default_model: str | None = None
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=0, le=65535)
    workers: int = Field(default=1, ge=1, le=64)
    api_keys: str | None = None
    api_keys_file: Path | None = None
    admin_without_keys: bool = False
    max_body_bytes: int = Field(default=1 << 20, ge=1024)
    max_events: int = Field(default=1000, ge=1)
    batch_rows: int = Field(default=64, ge=1)
    # warn: score, and name fields the model does not use in `ignored_fields`; reject: 422.
    # "ignore" is the earlier name of warn.
    unknown_fields: str = Field(default="warn", pattern="^(warn|ignore|reject)$")
    prediction_log: str = "predictions"
    prediction_log_queue: int = Field(default=100_000, ge=1)
    prediction_log_fsync_seconds: float = Field(default=1.0, gt=0)
    prediction_log_required: bool = False
    access_log: bool = True
    log_level: str = Field(default="info", pattern="^(critical|error|warning|info|debug)$")

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> Settings:
        """Read every ``CAUSELINE_*`` variable that names a setting; a bad value is one line."""
        environ = os.environ if environ is None else environ
        values: dict[str, object] = {}
        for name, field in cls.model_fields.items():
            raw = environ.get(PREFIX + name.upper())
            if raw is None:
                continue
            if field.annotation is bool:
                values[name] = raw.strip().lower() not in _OFF
            elif raw.strip() == "" and name in {"default_model", "api_keys", "api_keys_file"}:
                continue
            else:
                values[name] = raw.strip()
        try:
            return cls.model_validate(values)
        except ValidationError as exc:
            first = exc.errors()[0]
            name = PREFIX + str(first["loc"][0]).upper() if first.get("loc") else "settings"
            raise ConfigError(f"{name}: {first['msg']}") from None

    def with_flags(self, flags: Mapping[str, object]) -> Settings:
        """These settings with command-line flags (None: not given) taking precedence."""
        changes = {key: value for key, value in flags.items() if value is not None}
        try:
            return type(self).model_validate({**self.model_dump(), **changes})
        except ValidationError as exc:
            first = exc.errors()[0]
            raise ConfigError(f"--{first['loc'][0]}: {first['msg']}") from None

    def to_env(self) -> dict[str, str]:
        """The variables that reproduce these settings (for worker processes)."""
        out: dict[str, str] = {}
        for name in type(self).model_fields:
            value = getattr(self, name)
            if value is None:
                continue
            if isinstance(value, bool):
                value = "1" if value else "0"
            out[PREFIX + name.upper()] = str(value)
        return out

    @property
    def prediction_log_folder(self) -> Path | None:
        """The log folder, or None when the log is switched off (``off``)."""
        if self.prediction_log.strip().lower() in _OFF - {""} or not self.prediction_log.strip():
            return None
        return Path(self.prediction_log)
