"""From feature contributions to ranked reason codes with plain-language text.

Each catalogue code covers a set of features; its contribution for an event is the sum of theirs,
which is exact because SHAP values are additive. Codes sharing a feature set split it by the
event's value of the first feature: a ``high`` code takes events above the training typical value,
a ``low`` code those below. What no code takes (a value on the other side, a missing value) stays
in an unassigned remainder, so base value + codes + remainder is still the raw score.

Features that no code covers get an automatic code ``F_<FEATURE>`` so nothing goes unexplained.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import NamedTuple

import numpy as np

from causeline.service.bundle.manifest import FeatureStats
from causeline.service.spec.dataset import PLACEHOLDER, DatasetSpec, ReasonCode

Value = float | str | None


class Reason(NamedTuple):
    """One reason for one event (a named tuple: a scoring request makes a few per event, and a
    frozen dataclass cost three times as much to make)."""

    code: str
    text: str
    contribution: float
    values: dict[str, Value]


def automatic_code(feature: str) -> str:
    return f"F_{feature.upper()}"


class ReasonCatalogue:
    """The bundle's codes, ready to aggregate contributions and render reasons."""

    def __init__(self, spec: DatasetSpec, stats: Mapping[str, FeatureStats]) -> None:
        self.spec = spec
        self.feature_names = spec.feature_names
        self.stats = dict(stats)
        covered = {name for code in spec.reason_codes for name in code.features}
        self.codes: list[ReasonCode] = list(spec.reason_codes) + [
            ReasonCode(
                code=automatic_code(name),
                features=(name,),
                direction="any",
                text=f"{name} is {{{name}}} (typical {{{name}:typical}})",
            )
            for name in self.feature_names
            if name not in covered
        ]
        self.index = {code.code: position for position, code in enumerate(self.codes)}
        self._code_ids = [code.code for code in self.codes]
        position = {name: i for i, name in enumerate(self.feature_names)}
        # Which features each code sums, and the side of its first feature it claims.
        self._membership = np.zeros((len(self.feature_names), len(self.codes)))
        for column, code in enumerate(self.codes):
            for name in code.features:
                self._membership[position[name], column] = 1.0
        self._primary = np.array([position[code.features[0]] for code in self.codes], dtype=int)
        typical = [self.stats[code.features[0]].typical for code in self.codes]
        numeric = np.array([isinstance(t, float | int) for t in typical])
        directions = np.array([code.direction for code in self.codes])
        self._high = (directions == "high") & numeric
        self._low = (directions == "low") & numeric
        # A directional code without a numeric typical value can never claim its features.
        self._never = (directions != "any") & ~numeric
        self._typical = np.array([t if isinstance(t, float | int) else np.nan for t in typical])
        meanings = spec.missing_meanings
        self._templates = [Template(code.text, self.stats, meanings) for code in self.codes]
        # Per code, the features its reasons show: its own, then any its text names.
        self._shown = [
            [(name, position[name])
             for name in dict.fromkeys([*code.features, *code.placeholders()])]
            for code in self.codes
        ]
        self._categories = {
            name: s.categories for name, s in self.stats.items() if s.categories is not None
        }

    @property
    def code_ids(self) -> list[str]:
        return [code.code for code in self.codes]

    @property
    def causes(self) -> np.ndarray:
        """Per code, whether it describes a cause: some feature of it is not ``context``."""
        roles = {feature.name: feature.role for feature in self.spec.features}
        return np.array([any(roles[name] != "context" for name in code.features)
                         for code in self.codes], dtype=bool)

    def aggregate(self, contributions: np.ndarray, features: np.ndarray) -> np.ndarray:
        """Per-event contribution of each code, shape (events, codes), in log-odds."""
        summed = contributions @ self._membership
        primary = features[:, self._primary]
        # NaN compares false on both sides (quietly, in NumPy >= 1.26): a missing value stays
        # in the remainder.
        side = np.where(
            self._high, primary > self._typical,
            np.where(self._low, primary < self._typical, ~self._never),
        )
        return np.where(side, summed, 0.0)

    def rank(
        self, code_contributions: np.ndarray, top_k: int, min_contribution: float
    ) -> list[list[tuple[int, float]]]:
        """Up to ``top_k`` codes per event that raise the risk by more than ``min_contribution``."""
        order = top_order(code_contributions, top_k)
        values = code_contributions[np.arange(order.shape[0])[:, None], order]
        return [
            [(c, v) for c, v in zip(row_o, row_v, strict=True) if v > min_contribution]
            for row_o, row_v in zip(order.tolist(), values.tolist(), strict=True)
        ]

    def decode(self, name: str, value: float) -> Value:
        """A feature value as a person reads it: category names, None for missing."""
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return None
        categories = self._categories.get(name)
        if categories is not None:
            return categories[int(value)]
        return float(value)

    def reason(self, position: int, contribution: float, row: Sequence[float]) -> Reason:
        """Render code ``position`` for one event's feature values ``row`` (a list of floats
        is quickest: indexing an array makes a NumPy scalar per value)."""
        decode = self.decode
        values = {name: decode(name, row[column]) for name, column in self._shown[position]}
        return Reason(self._code_ids[position], self._templates[position].fill(values),
                      contribution, values)


class Template:
    """A reason text split once into literal text and the features whose values fill it.

    ``{feature}`` takes the event's value, ``{feature:typical}`` the training typical value
    (fixed, so written in at once). Never Python's format: a template cannot reach attributes.
    """

    def __init__(self, text: str, stats: Mapping[str, FeatureStats],
                 meanings: Mapping[str, str] | None = None) -> None:
        self.meanings = dict(meanings or {})  # words for a missing value that is a state
        self.parts: list[tuple[str, str | None]] = []  # literal text, then a feature or None
        position = 0
        for match in PLACEHOLDER.finditer(text):
            literal, name = text[position:match.start()], match.group(1)
            if match.group(2):
                self.parts.append((literal + format_value(stats[name].typical), None))
            else:
                self.parts.append((literal, name))
            position = match.end()
        self.tail = text[position:]

    def fill(self, values: Mapping[str, Value]) -> str:
        filled = [
            literal if name is None else literal + self._show(name, values.get(name))
            for literal, name in self.parts
        ]
        return "".join(filled) + self.tail

    def _show(self, name: str, value: Value) -> str:
        if value is None and name in self.meanings:
            return self.meanings[name]
        return format_value(value)


def format_value(value: Value) -> str:
    if value is None:
        return "missing"
    if isinstance(value, str):
        return value
    if float(value).is_integer() and abs(value) < 1e15:
        return str(int(value))
    return f"{value:.4g}" if abs(value) < 1e5 else f"{value:.0f}"


def top_order(code_contributions: np.ndarray, top_k: int) -> np.ndarray:
    """Per event, the positions of its ``top_k`` largest code contributions, largest first. A
    stable sort keeps catalogue order among ties, so rankings are reproducible."""
    k = min(top_k, code_contributions.shape[1])
    return np.argsort(-code_contributions, axis=1, kind="stable")[:, :k]


def carried(codes: np.ndarray, top_k: int, min_contribution: float) -> np.ndarray:
    """Per event and code, whether the code is among the event's reasons, as
    :meth:`ReasonCatalogue.rank` picks them, without building the lists (a boolean mask)."""
    order = top_order(codes, top_k)
    rows = np.arange(codes.shape[0])[:, None]
    out = np.zeros(codes.shape, dtype=bool)
    out[rows, order] = codes[rows, order] > min_contribution
    return out
