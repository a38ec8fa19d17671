"""Groups found on a sample against groups found on every event, at up to 10^6 events.

Every row an event: a fresh AI4I simulation (fixtures/ai4i2020/simulate.py, bundle trained on
the public file), the demo fleet (fixtures/demo/generate.py) or nightly pipeline jobs
(fixtures/jobs/generate.py, bundle trained on its default draw), all rows taken as events, so
most events have no real cause and their mixes fill the space between the causes, the hard
case for a sample. Per domain, size and seed the events are explained once (cached in
``CAUSELINE_BENCH_DIR``, default the temporary folder); then the profiles are found on every
event with a cause and on hash samples of each size (as the job draws them), every event is
placed by each, and the adjusted Rand index (scikit-learn) of each sample's groups against the
full fit's is printed with the fit times, the full fit's refining rounds and the process's
peak RSS. The ungrouped count as one group, as in event_groups.csv.

    python bench/fitsample.py --domain ai4i --rows 1000000 --seeds 41 42 43
    python bench/fitsample.py --domain demo --rows 200000 --seeds 41 --samples 20000 50000
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
from sklearn.metrics import adjusted_rand_score

from bench.common import ROOT, ai4i_bundle, demo_bundle, report


def _bundle(domain: str, folder: Path) -> Path:
    if domain == "demo":
        if not (folder / "demo" / "bundle" / "manifest.json").exists():
            demo_bundle(folder / "demo")
        return folder / "demo" / "bundle"
    if domain == "jobs":
        bundle = folder / "jobs" / "bundle"
        if not (bundle / "manifest.json").exists():
            from causeline.training.pipeline import train
            from fixtures.jobs.generate import generate

            data = folder / "jobs" / "runs.parquet"
            data.parent.mkdir(parents=True, exist_ok=True)
            generate().to_parquet(data, index=False)
            train(ROOT / "fixtures" / "jobs" / "config.yaml", data, bundle)
        return bundle
    return ai4i_bundle(folder / "ai4i-bundle")


def explained(domain: str, rows: int, seed: int, folder: Path) -> dict[str, np.ndarray]:
    """Mixes, lifts and id keys of every row of a fresh draw, all rows taken as events."""
    cache = folder / f"fitsample-{domain}-{rows}-{seed}.npz"
    if not cache.exists():
        from causeline.service.bundle.load import load_bundle
        from causeline.service.explain.explainer import Explainer
        from causeline.service.progress import Silent
        from causeline.service.rootcause.grouping import cause_lift, cause_mix, sample_keys
        from causeline.service.rootcause.local import explain_in_chunks

        bundle = load_bundle(_bundle(domain, folder))
        if domain == "demo":
            from fixtures.demo.generate import generate

            table = generate(cases=max(1, round(rows / 365)), days=365, seed=seed)
        elif domain == "jobs":
            from fixtures.jobs.generate import generate

            table = generate(pipelines=max(1, round(rows / 365)), days=365, seed=seed)
        else:
            from fixtures.ai4i2020.simulate import simulate

            table = simulate(rows=rows, seed=seed)
        explainer = Explainer(bundle)
        done = explain_in_chunks(explainer, table, Silent())
        mix, has = cause_mix(done.code_contributions, explainer.catalogue.causes)
        lift = cause_lift(done.code_contributions, explainer.catalogue.causes)
        np.savez(cache, mix=mix, has=has, lift=lift, keys=sample_keys(done.ids))
    with np.load(cache) as stored:
        return {name: stored[name] for name in ("mix", "has", "lift", "keys")}


def grouped(data: dict[str, np.ndarray], sample: int | None) -> tuple[np.ndarray, Any, float]:
    """Every event's group when the profiles are found on ``sample`` events (None: all)."""
    from causeline.service.rootcause.grouping import GroupFinder, bottom

    caused = np.flatnonzero(data["has"])
    fit = caused if sample is None else caused[bottom(data["keys"][caused], sample)]
    started = time.perf_counter()
    finder = GroupFinder().fit(data["mix"][fit], data["keys"][fit], caused.size, data["lift"][fit])
    took = time.perf_counter() - started
    labels, _ = finder.assign(data["mix"], data["has"])
    return labels, finder, took


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--domain", choices=["ai4i", "demo", "jobs"], default="ai4i")
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--seeds", type=int, nargs="+", default=[41])
    parser.add_argument("--samples", type=int, nargs="+", default=[20_000, 60_000, 100_000])
    args = parser.parse_args(argv)
    folder = Path(os.environ.get("CAUSELINE_BENCH_DIR") or tempfile.gettempdir())
    folder = folder / "causeline-bench-fitsample"
    folder.mkdir(parents=True, exist_ok=True)
    name = f"fitsample_{args.domain}_{args.rows}"
    worst: dict[int, float] = {}
    for seed in args.seeds:
        data = explained(args.domain, args.rows, seed, folder)
        report(f"{name}_seed_{seed}_events_with_cause", int(data["has"].sum()))
        full, finder, took = grouped(data, None)
        report(f"{name}_seed_{seed}_full_fit_s", took)
        report(f"{name}_seed_{seed}_full_fit_groups", int(finder.profiles_.shape[0]))
        report(f"{name}_seed_{seed}_full_fit_rounds", int(finder.rounds_))
        report(f"{name}_seed_{seed}_full_fit_fringes_parted", int(finder.splits_))
        report(f"{name}_seed_{seed}_full_fit_ungrouped_share", float(np.mean(full < 0)))
        for sample in args.samples:
            labels, fitted, took = grouped(data, sample)
            ari = float(adjusted_rand_score(full, labels))
            worst[sample] = min(worst.get(sample, 1.0), ari)
            report(f"{name}_seed_{seed}_sample_{sample}_fit_s", took)
            report(f"{name}_seed_{seed}_sample_{sample}_fringes_parted", int(fitted.splits_))
            report(f"{name}_seed_{seed}_sample_{sample}_ari_vs_full_fit", ari)
    for sample, ari in worst.items():
        report(f"{name}_sample_{sample}_ari_vs_full_fit_worst_seed", ari)
    report(f"{name}_peak_rss_mib", resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
    return 0


if __name__ == "__main__":
    sys.exit(main())
