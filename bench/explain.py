"""Explaining versus predicting on the demo model, measured in the same run.

Prints rows/s of LightGBM's plain prediction, of its TreeSHAP (`pred_contrib`, the explainer the
bundle uses) and of the full explanation path (features, contributions, reason codes, text), and
the ratios between them.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.common import demo_bundle, rate, report


def main() -> None:
    import pandas as pd

    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.explainer import Explainer
    from causeline.service.explain.treeshap import contributions

    path = demo_bundle()
    bundle = load_bundle(path)
    table = pd.read_parquet(path.parent / "cases.parquet").iloc[:20_000]
    x = bundle.builder.transform(table).values
    rows = x.shape[0]
    predict = rate(lambda: bundle.booster.predict(x, raw_score=True), rows)
    treeshap = rate(lambda: contributions(bundle.booster, x), rows)
    explainer = Explainer(bundle)
    explain = rate(lambda: explainer.explain(table), rows, repeat=1)
    single = table.iloc[:1]
    one = rate(lambda: explainer.explain(single), 1, repeat=50)
    report("explain.trees", float(bundle.booster.num_trees()))
    report("explain.predict_rows_per_s", predict)
    report("explain.pred_contrib_rows_per_s", treeshap)
    report("explain.full_path_rows_per_s", explain)
    report("explain.pred_contrib_over_predict", treeshap / predict)
    report("explain.full_path_over_pred_contrib", explain / treeshap)
    report("explain.single_event_ms", 1000.0 / one)


if __name__ == "__main__":
    main()
