"""The bundles being served, by name, and their swap without a restart.

A reload loads and verifies every bundle off to the side, then replaces the one reference that
requests read (a single attribute assignment). A request takes the current :class:`Served` once
and keeps it, so a request in flight during a swap finishes on the bundle it started with. A bundle
that fails verification is refused and the old ones keep serving; the failure is kept for the
readiness endpoint.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from causeline.service.bundle.load import Bundle, load_bundle
from causeline.service.bundle.manifest import CHECKSUMS
from causeline.service.errors import BundleError
from causeline.service.explain.explainer import Explainer


@dataclass(frozen=True)
class Model:
    """One loaded bundle and the explainer that scores with it."""

    bundle: Bundle
    explainer: Explainer

    @property
    def name(self) -> str:
        return self.bundle.name

    @property
    def version(self) -> str:
        return self.bundle.version


@dataclass(frozen=True)
class Served:
    """An immutable set of models; swapped as a whole."""

    models: dict[str, Model]
    default: str | None
    loaded_at: str

    def versions(self) -> dict[str, str]:
        return {name: model.version for name, model in self.models.items()}


@dataclass
class ReloadStatus:
    """The outcome of the last load attempt, for readiness and the admin endpoint."""

    ok: bool = True
    attempted_at: str | None = None
    error: str | None = None
    failures: int = field(default=0)


def bundle_folders(path: Path) -> list[Path]:
    """``path`` itself when it is a bundle, else the bundle folders directly inside it."""
    path = Path(path)
    if (path / CHECKSUMS).is_file():
        return [path]
    if not path.is_dir():
        raise BundleError(f"{path}: no such bundle folder")
    found = sorted(child for child in path.iterdir() if (child / CHECKSUMS).is_file())
    if not found:
        raise BundleError(f"{path}: neither a bundle nor a folder of bundles ({CHECKSUMS})")
    return found


def load_models(path: Path, default: str | None) -> Served:
    """Load and verify every bundle under ``path``; any failure refuses the whole set."""
    models: dict[str, Model] = {}
    for folder in bundle_folders(path):
        bundle = load_bundle(folder)
        if bundle.name in models:
            raise BundleError(f"{folder}: a second bundle named {bundle.name!r}")
        models[bundle.name] = Model(bundle, Explainer(bundle))
    if default is not None and default not in models:
        raise BundleError(
            f"default model {default!r} is not among the bundles ({', '.join(sorted(models))})"
        )
    if default is None and len(models) == 1:
        default = next(iter(models))
    return Served(models=models, default=default, loaded_at=_now())


class Registry:
    """Holds the current :class:`Served` set and swaps it on reload."""

    def __init__(self, path: Path, default: str | None = None) -> None:
        self.path = Path(path)
        self.default = default
        self.status = ReloadStatus()
        self._lock = threading.Lock()
        self._served: Served | None = None

    @property
    def served(self) -> Served:
        served = self._served
        if served is None:
            raise BundleError("no bundle is loaded yet")
        return served

    @property
    def ready(self) -> bool:
        return self._served is not None

    def reload(self) -> Served:
        """Load off to the side and swap; on failure keep the old set and raise."""
        with self._lock:  # one reload at a time; requests never take this lock
            self.status.attempted_at = _now()
            try:
                fresh = load_models(self.path, self.default)
            except Exception as exc:
                self.status.ok = False
                self.status.failures += 1
                self.status.error = _one_line(exc)
                raise
            self._served = fresh
            self.status.ok = True
            self.status.error = None
            return fresh


def _one_line(exc: Exception) -> str:
    if isinstance(exc, BundleError):
        return str(exc)
    return f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")
