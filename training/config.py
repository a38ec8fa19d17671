"""The data-set config: the spec of the table plus how to train on it.

A YAML file with the spec's keys (``name``, ``target``, ``id``, ``time``, ``entity``,
``features``, ``reason_codes``) and two optional sections, ``training`` and ``explain``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

import yaml
from pydantic import Field, model_validator

from causeline.service.errors import ConfigError
from causeline.service.spec.base import Strict, validate_model
from causeline.service.spec.dataset import DatasetSpec, ExplainSettings
from causeline.service.spec.timeline import TimelineSpec

# LightGBM parameters a config may set; the rest are fixed so runs stay comparable.
LIGHTGBM_KEYS = frozenset(
    {
        "learning_rate",
        "num_leaves",
        "max_depth",
        "min_child_samples",
        "min_sum_hessian_in_leaf",
        "feature_fraction",
        "bagging_fraction",
        "bagging_freq",
        "lambda_l1",
        "lambda_l2",
        "min_gain_to_split",
        "max_bin",
        "max_cat_to_onehot",
        "cat_smooth",
        "scale_pos_weight",
    }
)


class SplitSettings(Strict):
    """How rows are held out. ``auto`` splits by time if there is a time column, else by entity."""

    by: Literal["auto", "time", "entity", "random"] = "auto"
    holdout: float = Field(default=0.2, gt=0.0, lt=0.5)
    validation: float = Field(default=0.2, gt=0.0, lt=0.5)


class ThresholdSettings(Strict):
    """Exactly one of: the cost of a missed event relative to a false alarm, or a precision."""

    cost_ratio: float | None = Field(default=None, gt=0.0)
    precision: float | None = Field(default=None, gt=0.0, lt=1.0)

    @model_validator(mode="after")
    def _one(self) -> ThresholdSettings:
        if (self.cost_ratio is None) == (self.precision is None):
            raise ValueError("give exactly one of cost_ratio or precision")
        return self


class TrainingSettings(Strict):
    split: SplitSettings = SplitSettings()
    threshold: ThresholdSettings = ThresholdSettings(cost_ratio=10.0)
    calibration: Literal["sigmoid", "isotonic"] = "sigmoid"
    min_events: int = Field(default=30, ge=5)
    max_rounds: int = Field(default=2000, ge=10)
    early_stopping_rounds: int = Field(default=50, ge=5)
    seed: int = 0
    lightgbm: dict[str, float | int] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _known_parameters(self) -> TrainingSettings:
        unknown = sorted(set(self.lightgbm) - LIGHTGBM_KEYS)
        if unknown:
            raise ValueError(
                f"lightgbm.{unknown[0]} is not a parameter a config may set "
                f"(allowed: {', '.join(sorted(LIGHTGBM_KEYS))})"
            )
        return self


class TrainConfig(DatasetSpec):
    training: TrainingSettings = TrainingSettings()
    explain: ExplainSettings = ExplainSettings()

    def dataset_spec(self) -> DatasetSpec:
        """The part of the config that travels in the bundle."""
        return DatasetSpec.model_validate(self.model_dump(exclude={"training", "explain"}))


def load_config(path: Path) -> TrainConfig:
    """Read and validate a YAML config; errors name the file and the key."""
    return validate_model(TrainConfig, _read_yaml(Path(path)), str(path))


def load_timeline(path: Path) -> TimelineSpec:
    """Only the ``timeline:`` section of a config, validated: enough to list the features it
    builds before any are chosen (``features:`` may still be empty)."""
    data = _read_yaml(Path(path))
    section = data.get("timeline") if isinstance(data, dict) else None
    if section is None:
        raise ConfigError(f"{path}: the config has no timeline section")
    return validate_model(TimelineSpec, section, str(path), at="timeline")


def _read_yaml(path: Path) -> object:
    try:
        text = path.read_text("utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from None
    try:
        # safe_load builds plain data only: no tags, so no objects, so no code.
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", exc)
        raise ConfigError(f"{path}:{where} not valid YAML ({problem})") from None
