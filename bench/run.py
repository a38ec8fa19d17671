"""``make bench``: every benchmark in one run, as ``name: value`` lines."""

from __future__ import annotations

import runpy
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
BENCHMARKS = ["explain.py", "serving.py", "fastshap.py", "timeline.py", "rootcause.py"]


def main() -> int:
    for name in BENCHMARKS:
        path = HERE / name
        if not path.exists():
            continue
        print(f"# {name}", flush=True)
        runpy.run_path(str(path), run_name="__main__")
    return 0


if __name__ == "__main__":
    sys.exit(main())
