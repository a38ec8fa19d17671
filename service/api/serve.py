"""Run the HTTP service with uvicorn (``causeline serve``).

Settings travel to uvicorn's worker processes as ``CAUSELINE_*`` variables, so one worker or many
read the same configuration. Bundles are checked here first, so a bad path or a tampered bundle
stops the command with one line instead of a worker crash loop.
"""

from __future__ import annotations

import copy
import os

from causeline.service.api.settings import Settings

# LightGBM's OpenMP threads cost more than they save on one event and fight the request threads;
# one thread per prediction is the usual choice for serving (set before LightGBM is imported).
os.environ.setdefault("OMP_NUM_THREADS", "1")


def log_config(level: str) -> dict[str, object]:
    """uvicorn's logging setup, plus the service's own logger on the same handler."""
    from uvicorn.config import LOGGING_CONFIG

    config = copy.deepcopy(LOGGING_CONFIG)
    config["loggers"]["causeline"] = {
        "handlers": ["default"], "level": level.upper(), "propagate": False,
    }
    return config


def run(settings: Settings) -> None:
    """Check the bundles, then serve until interrupted."""
    import uvicorn

    from causeline.service.api.auth import ApiKeys
    from causeline.service.api.registry import load_models

    load_models(settings.bundle, settings.default_model)
    ApiKeys.load(settings.api_keys, settings.api_keys_file, settings.admin_without_keys)
    os.environ.update(settings.to_env())
    uvicorn.run(
        "causeline.service.api.app:app_from_environment",
        factory=True,
        host=settings.host,
        port=settings.port,
        workers=settings.workers,
        log_level=settings.log_level,
        log_config=log_config(settings.log_level),
        access_log=settings.access_log,
        server_header=False,
        timeout_graceful_shutdown=30,
    )
