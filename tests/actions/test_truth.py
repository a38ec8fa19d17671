"""What to change, checked against the generators' own rules (the outside truth here).

For held-out events of two invented domains (display cases running warm; nightly jobs failing)
the generator knows each event's planted cause and can re-run its hazard with the action
applied, downstream columns redone (a cleaned coil lowers the discharge pressure; a shorter
retention frees scratch disk). Two checks per domain:

- of the flagged events whose planted cause is a controllable feature, the action changes that
  feature for at least 90 % on the demo (the target the project set itself) and 80 % on the
  jobs; there the search picks a cheaper change than the planted cause's (shorter retention at
  cost 10 against a release upgrade at 20) for some faulty-release runs the model scores just
  above the threshold: the cheapest action the model believes in, not a diagnosis;
- the true risk never rises under an action, and it falls for at least 90 % of the actions
  that change the planted cause's feature.

Measured: demo 0.983 / 0.923 / 0.970 on fresh seeds 41-43 at 240 cases (trained per seed);
jobs 0.845 (seed 4321, the one here). The test prints its own figures.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from causeline.service.actions.search import ActionFinder
from causeline.service.bundle.load import Bundle, load_bundle
from causeline.service.explain.explainer import Explainer
from causeline.training.pipeline import train
from fixtures.demo import generate as demo
from fixtures.jobs import generate as jobs
from tests.conftest import FIXTURES

DEMO_CAUSES = {"dirty_coil": "days_since_coil_clean", "long_defrost": "defrost_interval_h",
               "firmware_fault": "controller_firmware"}
JOB_CAUSES = {"dependency_timeout": "client_timeout_s", "disk_full": "scratch_retention_days",
              "bad_release": "release", "credentials_expired": "credential_age_days"}
# How a team running the nightly jobs would allow changes (memory_limit_gb is read by the
# derived headroom feature, so the config refuses a change on it).
JOB_CHANGES = {
    "client_timeout_s": {"min": 30, "max": 600, "step": 10, "direction": "increase",
                         "cost": 5, "cost_per_unit": 0.01},
    "scratch_retention_days": {"min": 1, "max": 90, "step": 1, "direction": "decrease",
                               "cost": 10},
    "release": {"values": [jobs.FIXED_RELEASE], "cost": 20},
    "credential_age_days": {"min": 0, "max": 0, "cost": 15},
}


def _redo(frame: pd.DataFrame, changes: dict[str, object], driver: str, column: str,
          rule) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    """The frame with ``changes`` made and ``column`` re-derived by the generator's ``rule``
    when ``driver`` changed (a cleaned coil lowers the discharge pressure; a shorter retention
    frees scratch disk)."""
    out = frame.copy()
    for name, value in changes.items():
        out[name] = value
    if driver in changes:
        out[column] = rule(out)
    return out


def _demo_truth(frame: pd.DataFrame, changes: dict[str, object]) -> pd.DataFrame:
    return _redo(frame, changes, "days_since_coil_clean", "discharge_pressure_kpa",
                 lambda f: demo._discharge_pressure(
                     f["days_since_coil_clean"].to_numpy(float),
                     f["store_ambient_c"].to_numpy(float),
                     f["_truth_discharge_noise"].to_numpy(float)))


def _job_truth(frame: pd.DataFrame, changes: dict[str, object]) -> pd.DataFrame:
    return _redo(frame, changes, "scratch_retention_days", "scratch_disk_used_pct",
                 lambda f: jobs.disk_used_pct(
                     f["scratch_retention_days"].to_numpy(float), f["output_gb"].to_numpy(float),
                     f["_truth_disk_noise"].to_numpy(float)))


def _check(bundle: Bundle, events: pd.DataFrame, planted: np.ndarray, feature_of: dict,
           probability, redo) -> tuple[float, float]:  # type: ignore[no-untyped-def]
    explained = Explainer(bundle).explain(events)
    finder = ActionFinder(bundle, max_changes=2)
    hits, lowered = [], []
    for k in np.flatnonzero(explained.decision):
        action = finder.find(explained.features.values[k])
        changed = {c.feature: c.after for c in action.changes}
        if changed:
            before = probability(events.iloc[[k]])[0]
            after = probability(redo(events.iloc[[k]], changed))[0]
            assert after <= before + 1e-12, (events.iloc[k].to_dict(), changed)
        cause = planted[k]
        if cause in feature_of:
            hit = feature_of[cause] in changed
            hits.append(hit)
            if hit:
                lowered.append(after < before)
    assert len(hits) >= 50, len(hits)
    print(f"hit {np.mean(hits):.3f} of {len(hits)}; true risk lowered {np.mean(lowered):.3f}")
    return float(np.mean(hits)), float(np.mean(lowered))


def test_demo_actions_hit_the_planted_cause_and_lower_the_true_risk(
    demo_bundle: Bundle,
) -> None:
    # Fresh cases (another seed than the training table's): held-out by construction.
    frame = demo.generate(cases=160, days=365, seed=1234)
    events = frame[frame["went_warm_24h"] == 1].reset_index(drop=True)
    planted = demo.cause_hazards(events)[list(demo.CAUSES)].idxmax(axis=1).to_numpy()
    hit, lowered = _check(demo_bundle, events, planted, DEMO_CAUSES, demo.event_probability,
                          _demo_truth)
    assert hit >= 0.9 and lowered >= 0.9


@pytest.fixture(scope="module")
def job_bundle(tmp_path_factory: pytest.TempPathFactory) -> Bundle:
    folder = tmp_path_factory.mktemp("jobs")
    config = yaml.safe_load((FIXTURES / "jobs" / "config.yaml").read_text("utf-8"))
    for feature in config["features"]:
        if feature["name"] in JOB_CHANGES:
            feature["change"] = JOB_CHANGES[feature["name"]]
    (folder / "config.yaml").write_text(yaml.safe_dump(config, sort_keys=False), "utf-8")
    jobs.generate(pipelines=300, days=365, seed=5).to_parquet(folder / "runs.parquet")
    train(folder / "config.yaml", folder / "runs.parquet", folder / "bundle")
    return load_bundle(folder / "bundle")


def test_job_actions_hit_the_planted_cause_and_lower_the_true_risk(job_bundle: Bundle) -> None:
    frame = jobs.generate(pipelines=300, days=365, seed=4321)
    target = job_bundle.spec.target
    events = frame[frame[target] == 1].reset_index(drop=True)
    planted = events["cause"].to_numpy()
    hit, lowered = _check(job_bundle, events, planted, JOB_CAUSES, jobs.event_probability,
                          _job_truth)
    assert hit >= 0.8 and lowered >= 0.9


def test_the_config_refuses_a_change_on_a_feature_a_derived_one_reads(tmp_path: Path) -> None:
    from causeline.service.errors import ConfigError
    from causeline.training.config import load_config

    config = yaml.safe_load((FIXTURES / "jobs" / "config.yaml").read_text("utf-8"))
    for feature in config["features"]:
        if feature["name"] == "memory_limit_gb":
            feature["change"] = {"min": 8, "max": 128}
    (tmp_path / "config.yaml").write_text(yaml.safe_dump(config, sort_keys=False), "utf-8")
    with pytest.raises(ConfigError, match="reads 'memory_limit_gb', which has a change"):
        load_config(tmp_path / "config.yaml")
