"""The default demo fleet and its bundle, built once per test process for the root-cause tests.

Kept out of conftest.py so other suites' fixtures (which may use a smaller fleet) stay their own.
"""

from __future__ import annotations

import atexit
import functools
import shutil
import tempfile
from pathlib import Path

import pandas as pd

from fixtures.demo.generate import generate
from service.bundle import Bundle, load_bundle
from training.pipeline import train

ROOT = Path(__file__).resolve().parent.parent
DEMO_CONFIG = ROOT / "fixtures" / "demo" / "config.yaml"


@functools.cache
def _folder() -> Path:
    folder = Path(tempfile.mkdtemp(prefix="causeline-rootcause-tests-"))
    atexit.register(shutil.rmtree, folder, ignore_errors=True)
    return folder


@functools.cache
def default_fleet() -> pd.DataFrame:
    """The demo generator at its default size and seed (320 cases x 365 days, seed 7)."""
    return generate()


@functools.cache
def default_fleet_parquet() -> Path:
    path = _folder() / "cases.parquet"
    default_fleet().to_parquet(path, index=False)
    return path


@functools.cache
def default_fleet_bundle() -> Bundle:
    out = _folder() / "bundle"
    train(DEMO_CONFIG, default_fleet_parquet(), out)
    return load_bundle(out)
