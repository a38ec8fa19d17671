"""Shared set-up for benchmarks: the demo fleet's bundle and the public AI4I file's, trained
into a scratch folder."""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))


def demo_bundle(folder: Path | None = None, cases: int = 320, days: int = 365) -> Path:
    """Generate the demo fleet and train a bundle on it; returns the bundle's folder."""
    from causeline.training.pipeline import train
    from fixtures.demo.generate import generate

    folder = Path(folder or tempfile.mkdtemp(prefix="causeline-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    data = folder / "cases.parquet"
    generate(cases=cases, days=days).to_parquet(data, index=False)
    train(ROOT / "fixtures" / "demo" / "config.yaml", data, folder / "bundle")
    return folder / "bundle"


AI4I = ROOT / "fixtures" / "ai4i2020"


def ai4i_bundle(bundle: Path) -> Path:
    """A bundle trained on the public AI4I 2020 file into ``bundle``, unless one is there."""
    from causeline.training.pipeline import train

    if not (bundle / "manifest.json").exists():
        train(AI4I / "config.yaml", AI4I / "ai4i2020.csv", bundle)
    return bundle


def rate(function: Callable[[], object], rows: int, repeat: int = 3) -> float:
    """Best-of-``repeat`` rows per second."""
    best = float("inf")
    for _ in range(repeat):
        started = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - started)
    return rows / best


def report(name: str, value: float | str) -> None:
    text = f"{value:.4g}" if isinstance(value, float) else str(value)
    print(f"{name}: {text}", flush=True)
