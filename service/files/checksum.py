"""sha256 checksums of files, and the checksum list a bundle carries (``sha256sum``'s format)."""

from __future__ import annotations

import hashlib
from pathlib import Path


def sha256_file(path: Path) -> str:
    """The file's sha256 as hex, read a megabyte at a time."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def checksum_text(folder: Path, names: list[str]) -> str:
    """The checksum file's contents for ``names`` inside ``folder`` (sha256sum's format)."""
    return "".join(f"{sha256_file(folder / name)}  {name}\n" for name in sorted(names))
