"""Atomic writes: a failed run leaves the previous file or folder as it was."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current


def _publishable(path: Path, directory: bool) -> None:
    """mkstemp/mkdtemp create owner-only entries; give them the modes a plain write would."""
    os.chmod(path, (0o777 if directory else 0o666) & ~_umask())


def fsync_directory(path: Path) -> None:
    """Make a rename inside ``path`` durable (a no-op where directories cannot be opened)."""
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


@contextlib.contextmanager
def atomic_file(path: Path, mode: str = "wb") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; it replaces ``path`` only if the block succeeds."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    temporary = Path(name)
    try:
        yield temporary
        with open(temporary, "rb+") as handle:
            os.fsync(handle.fileno())
        _publishable(temporary, directory=False)
        os.replace(temporary, path)
        fsync_directory(path.parent)
    finally:
        temporary.unlink(missing_ok=True)


@contextlib.contextmanager
def atomic_directory(path: Path) -> Iterator[Path]:
    """Yield an empty staging folder that becomes ``path`` only if the block succeeds.

    An existing ``path`` is swapped out and removed after the new folder is in place, so readers
    see either the old complete folder or the new complete one.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
    try:
        yield staging
        for item in staging.rglob("*"):
            if item.is_file():
                with open(item, "rb") as handle:
                    os.fsync(handle.fileno())
        _publishable(staging, directory=True)
        retired: Path | None = None
        if path.exists():
            retired = Path(
                tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".old", dir=path.parent)
            )
            os.replace(path, retired / path.name)
        os.replace(staging, path)
        fsync_directory(path.parent)
        if retired is not None:
            shutil.rmtree(retired, ignore_errors=True)
    finally:
        if staging.exists():
            shutil.rmtree(staging, ignore_errors=True)
