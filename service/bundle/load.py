"""Loading a trained bundle: a folder of data that describes itself and can be verified.

Layout (all files listed with their sha256 in ``checksums.sha256``)::

    manifest.json     spec, feature statistics, calibration, threshold, metrics, versions
    model.txt         LightGBM's own text model
    MODEL_CARD.md     the model card, for people

Loading verifies every checksum first, then parses JSON and LightGBM's text format only;
nothing in a bundle can run code.
"""

from __future__ import annotations

import contextlib
import json
import re
from dataclasses import dataclass
from pathlib import Path

import lightgbm as lgb

from causeline.service.bundle.manifest import CHECKSUMS, MANIFEST, MODEL, SCHEMA_VERSION, Manifest
from causeline.service.errors import BundleError, ConfigError
from causeline.service.features.builder import FeatureBuilder
from causeline.service.files.checksum import sha256_file
from causeline.service.spec.base import validate_model
from causeline.service.spec.dataset import DatasetSpec

_CHECKSUM_LINE = re.compile(r"^([0-9a-f]{64})  ([A-Za-z0-9_.-]+)$")


@dataclass(frozen=True)
class Bundle:
    """A verified, loaded bundle."""

    path: Path
    manifest: Manifest
    booster: lgb.Booster
    builder: FeatureBuilder

    @property
    def name(self) -> str:
        return self.manifest.name

    @property
    def version(self) -> str:
        return self.manifest.version

    @property
    def spec(self) -> DatasetSpec:
        return self.manifest.dataset


def verify(path: Path) -> None:
    """Raise :class:`BundleError` unless every listed file is present and unchanged."""
    path = Path(path)
    if not path.is_dir():
        raise BundleError(f"{path}: not a bundle folder")
    listing = path / CHECKSUMS
    if not listing.is_file():
        raise BundleError(f"{path}: no {CHECKSUMS}; not a bundle or an incomplete one")
    expected: dict[str, str] = {}
    for number, line in enumerate(listing.read_text("utf-8").splitlines(), start=1):
        match = _CHECKSUM_LINE.match(line)
        if not match:
            raise BundleError(f"{listing}: line {number} is not '<sha256>  <file>'")
        expected[match.group(2)] = match.group(1)
    for required in (MANIFEST, MODEL):
        if required not in expected:
            raise BundleError(f"{listing}: does not list {required}")
    for name, digest in expected.items():
        file = path / name
        if not file.is_file():
            raise BundleError(f"{path}: {name} is listed but missing")
        if sha256_file(file) != digest:
            raise BundleError(f"{path}: {name} does not match its checksum; refusing to load")


def load_bundle(path: Path) -> Bundle:
    """Verify checksums, then parse the manifest and the LightGBM text model."""
    path = Path(path)
    verify(path)
    try:
        raw = json.loads((path / MANIFEST).read_text("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"{path / MANIFEST}: not valid JSON ({exc})") from None
    version = raw.get("schema_version") if isinstance(raw, dict) else None
    if version != SCHEMA_VERSION:
        raise BundleError(
            f"{path}: bundle schema version {version!r}; this causeline reads {SCHEMA_VERSION}"
        )
    try:
        manifest = validate_model(Manifest, raw, f"{path / MANIFEST}")
    except ConfigError as exc:
        raise BundleError(str(exc)) from None
    try:
        model_text = (path / MODEL).read_text("utf-8")
        _check_model_text(model_text, path / MODEL)
        booster = lgb.Booster(model_str=model_text)
    except (lgb.basic.LightGBMError, UnicodeDecodeError) as exc:
        raise BundleError(f"{path / MODEL}: not a LightGBM text model ({exc})") from None
    names = manifest.dataset.feature_names
    if booster.feature_name() != names:
        raise BundleError(f"{path}: the model's features do not match the manifest's")
    builder = FeatureBuilder(manifest.dataset.features, manifest.categories())
    return Bundle(path=path, manifest=manifest, booster=booster, builder=builder)


_TREE_SIZES = re.compile(r"^tree_sizes=([0-9 ]*)$", re.MULTILINE)


def _check_model_text(text: str, where: Path) -> None:
    """Refuse a model text that is cut short: LightGBM's parser aborts the process on one.

    The header's ``tree_sizes`` gives each tree's length, so the trees must end exactly where
    ``end of trees`` starts, and the text must end with its complete last line.
    """
    sizes = _TREE_SIZES.search(text)
    first = text.find("\nTree=0\n")
    last_line = text.rstrip("\n").rsplit("\n", 1)[-1]
    whole = sizes is not None and text.endswith("\n") and last_line.startswith(
        "pandas_categorical:") and "\nend of parameters\n" in text
    if whole and sizes is not None and first >= 0:
        end = first + 1 + sum(int(size) for size in sizes.group(1).split())
        whole = text[end:end + 40].lstrip("\n").startswith("end of trees")
    if whole:
        with contextlib.suppress(json.JSONDecodeError):
            json.loads(last_line.removeprefix("pandas_categorical:"))
            return
    raise BundleError(f"{where}: the LightGBM model text is cut short or altered; refusing to load")
