"""The compiled TreeSHAP explainer against LightGBM's ``pred_contrib``, in the same run.

A 300-tree, 31-leaf model is fitted on the demo fleet's features (fixed rounds, no early stopping,
the training pipeline's own LightGBM settings), then both engines explain the same 20,000 rows.
Prints rows/s of both and their ratio, single-event latency of both, the largest difference, and
the explainer's set-up and first-call times (numba loads compiled code from its cache).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.common import demo_bundle, rate, report

ROWS = 20_000
ROUNDS = 300


def main() -> None:
    import lightgbm as lgb
    import numpy as np
    import pandas as pd

    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.treeshap import contributions
    from causeline.training.fit import BASE_PARAMETERS

    path = demo_bundle()
    bundle = load_bundle(path)
    table = pd.read_parquet(path.parent / "cases.parquet")
    x = bundle.builder.transform(table).values
    y = table[bundle.spec.target].to_numpy(dtype=np.float64)
    categorical = [i for i, f in enumerate(bundle.spec.features) if f.kind == "categorical"]
    data = lgb.Dataset(x, label=y, categorical_feature=categorical, free_raw_data=False)
    booster = lgb.train({**BASE_PARAMETERS, "seed": 7}, data, num_boost_round=ROUNDS)
    rows = x[-ROWS:]

    started = time.perf_counter()
    from causeline.service.explain.fastshap import FastTreeExplainer

    explainer = FastTreeExplainer(booster)
    prepared = time.perf_counter()
    first = explainer.contributions(rows[:1])
    first_call = time.perf_counter()
    explainer.contributions(rows[:1000])
    first_batch = time.perf_counter()

    fast = explainer.contributions(rows)
    reference = contributions(booster, rows)
    difference = max(
        float(np.max(np.abs(fast.values - reference.values))),
        abs(fast.base_value - reference.base_value),
    )
    fast_rate = rate(lambda: explainer.contributions(rows), ROWS)
    reference_rate = rate(lambda: contributions(booster, rows), ROWS)
    single = rows[:1]
    fast_single = rate(lambda: explainer.contributions(single), 1, repeat=200)
    reference_single = rate(lambda: contributions(booster, single), 1, repeat=200)
    assert first.values.shape == (1, x.shape[1])

    report("fastshap.trees", float(booster.num_trees()))
    report("fastshap.engine", explainer.engine)
    report("fastshap.rows", float(ROWS))
    report("fastshap.fast_rows_per_s", fast_rate)
    report("fastshap.pred_contrib_rows_per_s", reference_rate)
    report("fastshap.speedup", fast_rate / reference_rate)
    report("fastshap.fast_single_event_ms", 1000.0 / fast_single)
    report("fastshap.pred_contrib_single_event_ms", 1000.0 / reference_single)
    report("fastshap.max_abs_difference", f"{difference:.3e}")
    report("fastshap.import_and_prepare_s", prepared - started)
    report("fastshap.first_single_call_s", first_call - prepared)
    report("fastshap.first_batch_call_s", first_batch - first_call)


if __name__ == "__main__":
    main()
