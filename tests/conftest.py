"""Shared fixtures: bundles trained once per test session on the committed data sets."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from causeline.service.bundle.load import Bundle, load_bundle
from causeline.training.pipeline import train

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
AI4I_CSV = FIXTURES / "ai4i2020" / "ai4i2020.csv"
AI4I_CONFIG = FIXTURES / "ai4i2020" / "config.yaml"


@pytest.fixture(scope="session")
def ai4i_table() -> pd.DataFrame:
    return pd.read_csv(AI4I_CSV)


@pytest.fixture(scope="session")
def ai4i_bundle(tmp_path_factory: pytest.TempPathFactory) -> Bundle:
    out = tmp_path_factory.mktemp("ai4i") / "bundle"
    train(AI4I_CONFIG, AI4I_CSV, out)
    return load_bundle(out)


DEMO_CONFIG = FIXTURES / "demo" / "config.yaml"
# The catalogue code for each planted cause, written out from the demo README's table of causes
# rather than read from the code under test.
DEMO_CAUSE_CODES = {
    "refrigerant_leak": "REFRIGERANT_LOW",
    "dirty_coil": "CONDENSER_FOULED",
    "door_traffic": "DOOR_TRAFFIC_HIGH",
    "long_defrost": "DEFROST_INTERVAL_LONG",
    "firmware_fault": "FIRMWARE_FAULT",
}


@pytest.fixture(scope="session")
def demo_table() -> pd.DataFrame:
    """The invented display-case fleet at its default size (320 cases x 365 days, seed 7)."""
    from fixtures.demo.generate import generate

    return generate()


@pytest.fixture(scope="session")
def demo_parquet(tmp_path_factory: pytest.TempPathFactory, demo_table: pd.DataFrame) -> Path:
    path = tmp_path_factory.mktemp("demo") / "cases.parquet"
    demo_table.to_parquet(path, index=False)
    return path


@pytest.fixture(scope="session")
def demo_bundle(demo_parquet: Path) -> Bundle:
    train(DEMO_CONFIG, demo_parquet, demo_parquet.parent / "bundle")
    return load_bundle(demo_parquet.parent / "bundle")
