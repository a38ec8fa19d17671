"""``make bench``: every benchmark in one run, as ``name: value`` lines."""

from __future__ import annotations

import runpy
import sys
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
# Each a script and its arguments; serving runs again on the demo's larger model, at 8
# connections, for the share of the time that grows with the model.
BENCHMARKS = ["explain.py", "actions.py", "serving.py",
              "serving.py --model demo --connections 8 --soak 0", "load.py", "fastshap.py",
              "timeline.py", "rootcause.py", "fitsample.py", "grouping.py", "effect.py",
              "drift.py"]


def main() -> int:
    failed = []
    for entry in BENCHMARKS:
        name, *arguments = entry.split()
        path = HERE / name
        if not path.exists():
            continue
        print(f"# {entry}", flush=True)
        sys.argv = [str(path), *arguments]
        try:
            runpy.run_path(str(path), run_name="__main__")
        except SystemExit as exc:  # a benchmark's own exit must not end the others
            if exc.code not in (None, 0):
                failed.append(entry)
        except Exception:  # report it, and still run the rest
            traceback.print_exc()
            failed.append(entry)
    if failed:
        print(f"# failed: {', '.join(failed)}", flush=True)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
