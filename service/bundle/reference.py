"""The drift reference a bundle keeps: what the training data looked like, for later checks.

Written at training time as ``reference.json`` (named in the manifest's ``reference`` key and
listed in the checksums); plain JSON, validated like the manifest. Per feature: the cut points
of its deciles and the share of rows in each bin, the missing share and, for a categorical
feature, the share of each category. Per part of the training data (``training``: all rows the
model was built from; ``held_out``: the rows kept out of fitting): per reason code the share of
events and of events at or above the threshold that carry it, its mean and spread of
contribution, and the deciles of the calibrated probability.
"""

from __future__ import annotations

import json
from pathlib import Path

from causeline.service.errors import BundleError, ConfigError
from causeline.service.spec.base import Strict, validate_model

REFERENCE = "reference.json"
REFERENCE_FORMAT = 1


class FeatureReference(Strict):
    """One feature's training distribution: bins (numeric) or categories, and missing share."""

    kind: str
    rows: int
    missing_share: float
    cuts: tuple[float, ...] = ()  # bin i holds cuts[i-1] < x <= cuts[i] (numeric)
    shares: tuple[float, ...] = ()  # share of present values per bin or per category


class CodeReference(Strict):
    """One reason code on a part of the training data."""

    share: float  # of events that carry it among their reasons
    share_flagged: float | None  # of events at or above the threshold that carry it
    mean_contribution: float  # log-odds, over all events (zero where the code does not claim)
    sd_contribution: float


class PartReference(Strict):
    """Reason codes and scores on one part of the training data."""

    rows: int
    flagged: int
    codes: dict[str, CodeReference]
    score_cuts: tuple[float, ...]
    score_shares: tuple[float, ...]
    mean_probability: float
    share_flagged: float


class Reference(Strict):
    """The whole reference: features, and codes and scores per part."""

    format: int
    rows: int
    entities: int | None = None  # distinct entities in the training data, where named
    sampled: bool
    features: dict[str, FeatureReference]
    parts: dict[str, PartReference]


def load_reference(bundle_path: Path, name: str | None) -> Reference:
    """Read and validate the bundle's reference; a clear line for a bundle without one."""
    if name is None:
        raise BundleError(f"{bundle_path}: this bundle keeps no drift reference (trained before "
                          "causeline kept one); train it again to check it for drift")
    path = Path(bundle_path) / name
    try:
        raw = json.loads(path.read_text("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"{path}: cannot be read as JSON ({exc})") from None
    found = raw.get("format") if isinstance(raw, dict) else None
    if found != REFERENCE_FORMAT:
        raise BundleError(f"{path}: reference format {found!r}; this causeline reads "
                          f"{REFERENCE_FORMAT}")
    try:
        return validate_model(Reference, raw, str(path))
    except ConfigError as exc:
        raise BundleError(str(exc)) from None
