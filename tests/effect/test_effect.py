"""The fix-effect study (causeline effect) against worked examples and planted truth.

- Card & Krueger (1994, AER 84(4)), as tabulated in Angrist & Pischke, *Mostly Harmless
  Econometrics* (2009), table 5.2.1: mean full-time-equivalent employment per fast-food store
  in New Jersey (minimum wage raised) and Pennsylvania (not), before and after. The numbers
  below are quoted from memory of that table: NJ 20.44 -> 21.03, PA 23.33 -> 21.17, changes
  +0.59 and -2.16, difference-in-differences 2.76 (from the unrounded means; the rounded cells
  give 2.75).
- Planted truth: fixtures/demo/planted.py redraws the demo fleet's events with known fix
  effects and replays every case without its actions; the effect on the treated it defines is
  the target. The 20-seed coverage study is bench/effect.py (docs/effect.md has its figures);
  here three seeds of a smaller fleet.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats

from causeline.cli import main as causeline
from causeline.service.effect.design import Stack, Window, stack
from causeline.service.effect.estimate import StackedDiD, expanded_tail
from causeline.service.effect.job import EffectOptions, study
from causeline.service.effect.link import links
from causeline.service.effect.panel import entity_weeks
from causeline.service.effect.trigger import after_failures
from causeline.service.errors import ConfigError, DataError
from causeline.service.features.logs import TimelineInputs
from causeline.service.spec.dataset import DatasetSpec
from causeline.training.config import load_config
from fixtures.demo.planted import DEFAULT_PLAN, PlantedFix, planted_config
from fixtures.demo.timeline import planted_timeline, write_timeline

CONFIG = Path(__file__).resolve().parents[2] / "fixtures" / "demo" / "timeline.yaml"
OPTIONS = EffectOptions(bootstrap=299)


def _spec(plan: tuple[PlantedFix, ...] = DEFAULT_PLAN, within: str | None = "store_id"
          ) -> DatasetSpec:
    """The planted config (cases compared within their store), or across the fleet."""
    raw = planted_config(plan)
    raw["timeline"]["attributes"]["compare_within"] = within
    raw.pop("training", None)
    raw.pop("explain", None)
    return DatasetSpec.model_validate(raw)


def _inputs(timeline) -> TimelineInputs:  # type: ignore[no-untyped-def]
    return TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                          timeline.cases)


def _two_group_stack(treated: list[tuple[float, float]], comparison: list[tuple[float, float]]
                     ) -> Stack:
    """One block: each store's mean before and after as events over 1,000 days (so its rate
    per 1,000 days is the mean itself), split over two weeks either side of the action week."""
    window = Window(2, 2)
    rows = treated + comparison
    events = np.zeros((len(rows), window.width))
    days = np.zeros((len(rows), window.width))
    for i, (before, after) in enumerate(rows):
        events[i, [0, 1]] = before / 2
        events[i, [3, 4]] = after / 2
        days[i, [0, 1, 3, 4]] = 500.0
    flags = np.array([True] * len(treated) + [False] * len(comparison))
    return Stack(np.arange(len(rows)), np.zeros(len(rows), dtype=np.int64), flags, events, days,
                 np.array([10]), window, actions=len(treated), episodes=len(treated),
                 unmatched=0, edge=0, crowded=0)


def test_card_krueger_difference_in_differences() -> None:
    # Stores spread around the published means (the spreads cancel), so the bootstrap has
    # something to resample; the point estimate depends only on the means.
    nj = [(20.44 + d, 21.03 - d / 2) for d in (-3.0, 0.0, 3.0)]
    pa = [(23.33 + d, 21.17 + d) for d in (-2.0, 0.0, 2.0)]
    rates = StackedDiD(bootstrap=199).fit(_two_group_stack(nj, pa)).rates_
    assert rates.treated_before == pytest.approx(20.44, abs=1e-9)
    assert rates.treated_after == pytest.approx(21.03, abs=1e-9)
    assert rates.comparison_before == pytest.approx(23.33, abs=1e-9)
    assert rates.comparison_after == pytest.approx(21.17, abs=1e-9)
    assert rates.treated_after - rates.treated_before == pytest.approx(0.59, abs=1e-9)
    assert rates.comparison_after - rates.comparison_before == pytest.approx(-2.16, abs=1e-9)
    assert rates.effect == pytest.approx(2.75, abs=1e-9)
    # The published 2.76, up to the rounding of four cells to 0.005 each.
    assert abs(rates.effect - 2.76) <= 0.02 + 1e-9
    assert rates.low <= rates.effect <= rates.high


def test_planted_effects_are_recovered() -> None:
    # Six fresh seeds of a smaller fleet; 95 % intervals should cover the truth on about 5.7
    # of them, and 4 or more covers happen with probability 0.998 when the intervals are right.
    # Across the fleet the 40 % cut is told from zero on 4 or more; compared within stores,
    # whose intervals are some 10 % wider, it is not asked to be (docs/effect.md, Checks).
    covered = {"coil_cleaning": 0, "firmware_update": 0}
    within = dict(covered)
    found = 0
    for seed in range(21, 27):
        timeline, planted = planted_timeline(cases=160, days=300, seed=seed)
        stored = study(_spec(), _inputs(timeline), OPTIONS).table.set_index("action_kind")
        for kind in within:
            row = stored.loc[kind]
            truth = planted.truth(kind, OPTIONS.after)
            within[kind] += int(row["effect_low"] <= truth <= row["effect_high"])
        assert (stored["compared_within"] == "store_id").all()
        result = study(_spec(within=None), _inputs(timeline), OPTIONS).table.set_index(
            "action_kind")
        for kind in covered:
            row = result.loc[kind]
            truth = planted.truth(kind, OPTIONS.after)
            assert row["status"] == "measured", row["warning"]
            covered[kind] += int(row["effect_low"] <= truth <= row["effect_high"])
            # The printed parts add up to the effect.
            parts = ((row["treated_after_per_1000"] - row["treated_before_per_1000"])
                     - (row["comparison_after_per_1000"] - row["comparison_before_per_1000"]))
            assert parts == pytest.approx(row["effect_per_1000"])
        assert planted.truth("firmware_update", OPTIONS.after) == 0.0
        found += int(result.loc["coil_cleaning", "effect_high"] < 0)  # a 40 % cut
        repair = result.loc["leak_repair"]
        assert repair["status"] == "no estimate"
        assert repair["warning"].startswith("follows failures")
        assert np.isnan(repair["effect_per_1000"]) and np.isnan(repair["treated_before_per_1000"])
    assert min(covered.values()) >= 4, covered
    assert min(within.values()) >= 4, within
    assert found >= 4


def test_too_few_treated_gives_no_number() -> None:
    plan = (PlantedFix("coil_cleaning", 0.6, share=0.04), PlantedFix("firmware_update", 1.0))
    timeline, _ = planted_timeline(cases=120, days=300, seed=4, plan=plan)
    table = study(_spec(plan), _inputs(timeline), OPTIONS).table.set_index("action_kind")
    row = table.loc["coil_cleaning"]
    assert row["treated_entities"] < 10
    assert "too few treated entities" in row["warning"] and np.isnan(row["effect_per_1000"])
    assert table.loc["firmware_update", "status"] == "measured"


def _uniform_logs(weeks: int, action_weeks: list[int | None]) -> TimelineInputs:
    """Daily readings of entities for ``weeks`` weeks from a Monday; one action each where a
    week is given; a failure every tenth day of every entity."""
    start = pd.Timestamp("2025-01-06 06:00")
    days = pd.date_range(start, periods=7 * weeks, freq="D")
    names = [f"E{i:02d}" for i in range(len(action_weeks))]
    readings = pd.DataFrame([(n, t, 1.0) for n in names for t in days],
                            columns=["unit", "time", "load"])
    failures = pd.DataFrame([(n, t + pd.Timedelta(hours=3)) for n in names
                             for t in days[::10]], columns=["unit", "time"])
    actions = pd.DataFrame([(n, start + pd.Timedelta(weeks=w, days=2), "service")
                            for n, w in zip(names, action_weeks, strict=True) if w is not None],
                           columns=["unit", "time", "kind"])
    return TimelineInputs(readings, failures, actions)


def _minimal_spec() -> DatasetSpec:
    return DatasetSpec.model_validate({
        "name": "units", "target": "failed", "id": "id", "time": "time", "entity": "unit",
        "timeline": {"unit": "d", "readings": {"entity": "unit", "time": "time",
                                               "measurements": ["load"]},
                     "failures": {"entity": "unit", "time": "time"},
                     "actions": {"entity": "unit", "time": "time", "kind_column": "kind",
                                 "kinds": ["service"]},
                     "snapshots": {"every": "1d"}, "horizon": "1d"},
        "features": [{"name": "since_service_d", "role": "controllable"}],
    })


def test_no_comparison_group_gives_no_number() -> None:
    # Every entity is serviced in the same week: nothing untreated to compare with.
    inputs = _uniform_logs(20, [9] * 12)
    row = study(_minimal_spec(), inputs, OPTIONS).table.iloc[0]
    assert row["warning"].startswith("no comparison group") and np.isnan(row["effect_per_1000"])
    assert row["episodes_unmatched"] == 12


def test_a_kind_without_effect_on_a_flat_fleet_measures_zero() -> None:
    # Identical entities, failures on a fixed schedule: every rate is the same, so is the
    # change, whoever is treated; half the entities treated in staggered weeks.
    inputs = _uniform_logs(30, [8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19] + [None] * 12)
    row = study(_minimal_spec(), inputs, EffectOptions(bootstrap=99)).table.iloc[0]
    assert row["status"] == "measured", row["warning"]
    assert abs(row["effect_per_1000"]) < 15  # schedule phase differs by entity; near zero
    assert row["effect_low"] <= 0 <= row["effect_high"]
    panel = entity_weeks(_minimal_spec().timeline, inputs)  # type: ignore[arg-type]
    built = stack(panel, "service", Window())
    assert built.count(True) == 12 and built.crowded == 0


def _seasonal_logs(seed: int, after_failure: bool) -> TimelineInputs:
    """40 entities read hourly for 52 weeks; a failure every third day in weeks 20-30 (the
    season) and every 30th day outside it, each entity on its own phase. One service per
    entity: on a random hour in the season, or 2-4 days after a random failure outside it."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2025-01-06")
    hours = pd.date_range(start, periods=52 * 7 * 24, freq="h")
    names = [f"E{i:02d}" for i in range(40)]
    readings = pd.DataFrame({"unit": np.repeat(names, hours.size),
                             "time": np.tile(hours, len(names)), "load": 1.0})
    failures, actions = [], []
    for name in names:
        day, own = float(rng.uniform(0, 30)), []
        while day < 52 * 7:
            own.append(start + pd.Timedelta(days=day))
            day += 3 if 140 <= day < 210 else 30
        failures += [(name, t) for t in own]
        if after_failure:
            calm = [t for t in own if not 140 <= (t - start).days < 210 and (t - start).days > 50
                    and (t - start).days < 300]
            when = calm[rng.integers(len(calm))] + pd.Timedelta(days=float(rng.uniform(2, 4)))
        else:
            when = start + pd.Timedelta(days=float(rng.uniform(140, 210)))
        actions.append((name, when, "service"))
    return TimelineInputs(readings, pd.DataFrame(failures, columns=["unit", "time"]),
                          pd.DataFrame(actions, columns=["unit", "time", "kind"]))


def _brute_chance(inputs: TimelineInputs, days: float, around: tuple[float, float]) -> float:
    """The reference: per action, on a grid of minutes over its window, the share of points
    within ``days`` after a failure of its entity; averaged over the actions."""
    out = []
    for unit, when in inputs.actions[["unit", "time"]].itertuples(index=False):
        seen = inputs.readings.loc[inputs.readings["unit"] == unit, "time"]
        low = max(when - pd.Timedelta(days=around[0]), seen.min())
        high = min(when + pd.Timedelta(days=around[1]), seen.max())
        grid = pd.date_range(low, high, freq="min").to_numpy()
        failed = np.sort(inputs.failures.loc[inputs.failures["unit"] == unit, "time"].to_numpy())
        last = np.searchsorted(failed, grid, side="right") - 1
        since = grid - failed[np.maximum(last, 0)]
        out.append(np.mean((last >= 0) & (since <= np.timedelta64(int(days * 86400), "s"))))
    return float(np.mean(out))


def test_following_failures_is_judged_against_the_same_entities_nearby_time() -> None:
    # Services done in the season, when failures bunch, at random hours: the entities' own
    # weeks around each service fail about as often, so no warning (against the entities'
    # whole year the services would look like following failures). Services 2-4 days after a
    # failure in calm weeks are flagged. The chance is checked against a brute-force count
    # on a grid of minutes.
    spec = _minimal_spec()
    for after_failure in (False, True):
        inputs = _seasonal_logs(4, after_failure)
        panel = entity_weeks(spec.timeline, inputs)  # type: ignore[arg-type]
        found = after_failures(panel, panel.actions["service"], around=(42.0, 49.0))
        assert found.chance == pytest.approx(_brute_chance(inputs, 7.0, (42.0, 49.0)),
                                             abs=0.005)
        assert found.follows is after_failure, found
        if not after_failure:
            # Against each entity's whole year the same services would pass the excess rule.
            assert found.share >= _brute_chance(inputs, 7.0, (400.0, 400.0)) + 0.2


def test_kinds_link_to_their_fixes() -> None:
    found = {(link.action_kind, link.fix_kind): link for link in links(_spec())}
    assert found["coil_cleaning", "coil cleaning"].how == "its targets set since_coil_cleaning_d"
    assert found["firmware_update", "firmware update"].how == "same name"
    assert found["leak_repair", "leak search and repair"].codes == ("REFRIGERANT_LOW",)



def test_a_fix_naming_an_untracked_kind_is_refused(tmp_path: Path) -> None:
    raw = yaml.safe_load(CONFIG.read_text())
    raw["reason_codes"][0]["fix"]["actions"] = ["leak_repairs"]
    path = tmp_path / "config.yaml"
    path.write_text(yaml.safe_dump(raw))
    with pytest.raises(ConfigError, match=r"fix.actions: 'leak_repairs' is not one of"):
        load_config(path)


def test_model_estimate_beside_the_measured_effect(tmp_path: Path) -> None:
    # The demo's own mechanisms (fixtures/demo/generate.py): a cleaner coil and the fixed
    # firmware both lower the hazard, so the model's simulated fix must promise fewer events.
    from causeline.service.bundle.load import load_bundle
    from causeline.service.features.logs import RawPaths
    from causeline.training.pipeline import train_timeline
    from fixtures.demo.generate import generate
    from fixtures.demo.timeline import from_frame

    write_timeline(from_frame(generate(cases=70, days=240, seed=6)), tmp_path)
    paths = RawPaths(tmp_path / "readings.parquet", tmp_path / "excursions.parquet",
                     tmp_path / "maintenance.parquet", tmp_path / "cases.parquet")
    train_timeline(CONFIG, paths, tmp_path / "bundle")
    from causeline.service.effect.job import run_effect

    table = run_effect(load_config(CONFIG), paths, tmp_path / "out", OPTIONS,
                       load_bundle(tmp_path / "bundle")).table.set_index("action_kind")
    for kind, target in (("coil_cleaning", "since_coil_cleaning_d <= 30"),
                         ("firmware_update", "controller_firmware = 4.2.3")):
        row = table.loc[kind]
        assert row["model_targets"] == target
        assert row["model_snapshots"] > 0 and row["model_effect_per_1000"] < 0, row.to_dict()
    # With a bundle the chart draws the model's estimate, and its legend names it.
    assert "model estimate" in (tmp_path / "out" / "report.html").read_text()


def test_command_writes_csvs_summary_and_page(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    timeline, _ = planted_timeline(cases=80, days=240, seed=9)
    write_timeline(timeline, tmp_path / "logs")
    config = tmp_path / "config.yaml"
    config.write_text(yaml.safe_dump(planted_config(DEFAULT_PLAN)))
    logs = tmp_path / "logs"
    args = ["effect", "--config", str(config), "--readings", str(logs / "readings.parquet"),
            "--failures", str(logs / "excursions.parquet"), "--actions",
            str(logs / "maintenance.parquet"), "--attributes", str(logs / "cases.parquet"),
            "--bootstrap", "99", "--quiet", "--out", str(tmp_path / "out")]
    assert causeline(args) == 0
    out = tmp_path / "out"
    names = {p.name for p in out.iterdir()}
    assert {"coil-cleaning.csv", "firmware-update.csv", "leak-search-and-repair.csv",
            "effects.csv", "weeks.csv", "summary.json", "report.html"} <= names
    coil = pd.read_csv(out / "coil-cleaning.csv")
    for column in ("treated_before_per_1000", "treated_after_per_1000", "effect_per_1000",
                   "effect_low", "effect_high", "treated_entities", "comparison_entities",
                   "model_effect_per_1000"):
        assert column in coil.columns
    page = (out / "report.html").read_text()
    assert "Did the fix work?" in page and "<script" not in page and "follows failures" in page
    # No bundle, so no model estimate: the legend does not offer one.
    assert "model estimate" not in page
    # A kind with no number shows empty rate cells, not a bare arrow.
    assert '<td class="num"> → </td>' not in page
    weeks = (out / "weeks.csv").read_text().splitlines()[1:]
    assert weeks and all(len(cell.partition(".")[2]) <= 3 for line in weeks
                         for cell in line.split(",")[2:])
    # The planted config compares within stores, and the page says so.
    assert "compared within store_id" in page and "of the same store_id only" in page
    assert "no number: follows failures" in capsys.readouterr().out
    # Resampling its few stores gives every measured row a note, printed under the row.
    assert causeline([*args[:-2], "--cluster-by", "store_id", "--out", str(tmp_path / "s")]) == 0
    printed = capsys.readouterr().out
    notes = pd.read_csv(tmp_path / "s" / "effects.csv")["note"].dropna()
    assert len(notes) == 2 and all("    note: " + n.split("; ")[0] in printed for n in notes)
    assert causeline([*args[:-2], "--weeks-before", "0", "--out", str(tmp_path / "x")]) == 2
    assert causeline(["effect", "--config", str(config), "--out", str(tmp_path / "y")]) == 2


def _weekly_stack(treated: np.ndarray, comparison: np.ndarray) -> Stack:
    """One block, window 6 and 6: each row's rate per 1,000 days in each of the 13 weeks
    (fractional events over 7 observed days a week)."""
    rates = np.vstack([treated, comparison])
    days = np.full(rates.shape, 7.0)
    flags = np.array([True] * len(treated) + [False] * len(comparison))
    return Stack(np.arange(len(rates)), np.zeros(len(rates), dtype=np.int64), flags,
                 rates * days / 1000.0, days, np.array([10]), Window(6, 6),
                 actions=len(treated), episodes=len(treated), unmatched=0, edge=0, crowded=0)


def test_pretrend_is_the_weekly_gaps_trend_carried_to_the_weeks_after() -> None:
    # The treated drift up by 1.5 per 1,000 a week before the action, the comparison is flat;
    # each row has its own level, so the bootstrap has something to resample. The reference
    # is numpy's least-squares line through the weekly gaps, carried over the 7 weeks between
    # the middle of the weeks before (-3.5) and of the weeks after (+3.5).
    rng = np.random.default_rng(5)
    weeks = np.arange(13)
    treated = 30 + rng.normal(0, 3, (40, 1)) + 1.5 * np.minimum(weeks, 6)
    comparison = 30 + rng.normal(0, 3, (60, 1)) + 0 * weeks
    rates = StackedDiD(bootstrap=299).fit(_weekly_stack(treated, comparison)).rates_
    gaps = treated[:, :6].mean(axis=0) - comparison[:, :6].mean(axis=0)
    assert rates.pretrend == pytest.approx(np.polyfit(np.arange(6), gaps, 1)[0] * 7)
    assert rates.pretrend == pytest.approx(10.5)
    assert rates.pretrend_low > 0
    # Parallel before the action: a trend near zero whose interval holds zero.
    flat = StackedDiD(bootstrap=299).fit(_weekly_stack(
        treated - 1.5 * np.minimum(weeks, 6) + rng.normal(0, 2, treated.shape),
        comparison + rng.normal(0, 2, comparison.shape))).rates_
    assert flat.pretrend_low <= 0 <= flat.pretrend_high


def test_balance_is_the_standardized_difference_before() -> None:
    # Stuart (2010, Statistical Science 25(1)): the difference of the groups' means over the
    # square root of the mean of their variances (population moments here, equal weights).
    rng = np.random.default_rng(8)
    treated = np.repeat(rng.gamma(4, 10, (30, 1)), 13, axis=1)
    comparison = np.repeat(rng.gamma(4, 8, (50, 1)), 13, axis=1)
    rates = StackedDiD(bootstrap=99).fit(_weekly_stack(treated, comparison)).rates_
    t, c = treated[:, 0], comparison[:, 0]
    assert rates.balance == pytest.approx((t.mean() - c.mean()) / np.sqrt((t.var() + c.var()) / 2))


def _clustered_changes(seed: int) -> tuple[Stack, np.ndarray, np.ndarray]:
    """One block of 240 entities in 60 stores of four, a store either all treated or all
    comparison; each entity's change from before to after is its store's shock (sd 2) plus
    its own noise (sd 1). Returns the stack, the changes and the store of each entity."""
    rng = np.random.default_rng(seed)
    store = np.repeat(np.arange(60), 4)
    treated = store < 30
    change = rng.normal(0.0, 2.0, 60)[store] + rng.normal(0.0, 1.0, store.size)
    rows = [(30.0, 30.0 + c) for c in change]
    built = _two_group_stack([r for r, t in zip(rows, treated, strict=True) if t],
                             [r for r, t in zip(rows, treated, strict=True) if not t])
    order = np.concatenate([np.flatnonzero(treated), np.flatnonzero(~treated)])
    return built, change[order], store[order]


def _sandwich_se(change: np.ndarray, treated: np.ndarray, cluster: np.ndarray) -> float:
    """The cluster-robust (Liang & Zeger 1986, Biometrika 73(1)) standard error of a
    difference of two means: the square root of the sum over clusters of the squared sum of
    each member's influence, (y - group mean) / group size, signed by its side."""
    influence = np.empty(change.size)
    for side, sign in ((treated, 1.0), (~treated, -1.0)):
        influence[side] = sign * (change[side] - change[side].mean()) / side.sum()
    sums = np.bincount(cluster, weights=influence)
    return float(np.sqrt(np.sum(sums ** 2)))


def test_cluster_bootstrap_matches_the_cluster_robust_standard_error() -> None:
    # With equal days everywhere the effect is a difference of mean changes, whose variance
    # the cluster-robust sandwich gives in closed form; a bootstrap over the same clusters
    # estimates the same variance (Cameron, Gelbach & Miller 2008). Stores share shocks, so
    # resampling entities alone understates it by about half here.
    built, change, store = _clustered_changes(seed=3)
    treated = built.treated
    by_store = StackedDiD(bootstrap=1999, seed=1).fit(built, store)
    alone = StackedDiD(bootstrap=1999, seed=1).fit(built)
    for fit, cluster in ((by_store, store), (alone, np.arange(store.size))):
        reference = _sandwich_se(change, treated, cluster)
        # The interval is read at the expanded percentiles: so many standard errors wide.
        z = -stats.norm.ppf(expanded_tail(0.95, fit.treated_clusters_))
        se = (fit.rates_.high - fit.rates_.low) / (2 * z)
        assert se == pytest.approx(reference, rel=0.15), (se, reference)
        assert fit.rates_.effect == pytest.approx(
            change[treated].mean() - change[~treated].mean())
    assert by_store.clusters_ == 60 and by_store.treated_clusters_ == 30
    assert alone.clusters_ == 240 and alone.treated_clusters_ == 120
    assert (by_store.rates_.high - by_store.rates_.low) > 1.5 * (alone.rates_.high
                                                                 - alone.rates_.low)


def test_cluster_by_an_attribute(tmp_path: Path) -> None:
    timeline, _ = planted_timeline(cases=80, days=240, seed=9)
    spec = _spec()
    options = EffectOptions(bootstrap=99)
    table = study(spec, _inputs(timeline), options).table.set_index("action_kind")
    assert (table["cluster_by"] == "entity").all()
    by_store = study(spec, _inputs(timeline), EffectOptions(bootstrap=99, cluster_by="store_id")
                     ).table.set_index("action_kind")
    stores = timeline.cases["store_id"].nunique()
    row = by_store.loc["firmware_update"]
    assert row["cluster_by"] == "store_id" and row["clusters"] == stores, row.to_dict()
    # The point estimate does not depend on what the bootstrap resamples.
    assert row["effect_per_1000"] == table.loc["firmware_update", "effect_per_1000"]
    assert "too narrow" in row["note"]  # 12 stores: fewer than about 30 clusters
    # The config can carry it; naming the entity column means each entity alone.
    raw = planted_config(DEFAULT_PLAN)
    raw.pop("training", None)
    raw.pop("explain", None)
    raw["timeline"]["attributes"]["cluster_by"] = "store_id"
    from_config = study(DatasetSpec.model_validate(raw), _inputs(timeline), options).table
    assert (from_config["cluster_by"] == "store_id").all()
    alone = study(DatasetSpec.model_validate(raw), _inputs(timeline),
                  EffectOptions(bootstrap=99, cluster_by="case_id")).table
    assert (alone["cluster_by"] == "entity").all()
    with pytest.raises(DataError, match="no such column"):
        study(spec, _inputs(timeline), EffectOptions(bootstrap=99, cluster_by="aisle"))
    partial = _inputs(timeline)
    cases = timeline.cases.assign(store_id=timeline.cases["store_id"].where(
        timeline.cases.index > 0))
    with pytest.raises(DataError, match="1 entities with readings have no 'store_id'"):
        study(spec, TimelineInputs(partial.readings, partial.failures, partial.actions, cases),
              EffectOptions(bootstrap=99, cluster_by="store_id"))


def test_expanded_percentile_tail() -> None:
    # Hesterberg (2015, The American Statistician 69(4); the formula from memory): a 95 %
    # interval from n = 10 is read at Phi(-sqrt(10 / 9) * t(0.975, 9)), where the printed
    # t table gives t(0.975, 9) = 2.262; with many clusters it is the plain 2.5th percentile.
    assert expanded_tail(0.95, 10) == pytest.approx(stats.norm.cdf(-np.sqrt(10 / 9) * 2.262),
                                                    abs=2e-5)
    assert expanded_tail(0.95, 100_000) == pytest.approx(0.025, abs=1e-4)
    assert expanded_tail(0.95, 12) < expanded_tail(0.95, 60) < expanded_tail(0.95, 600) < 0.025


def test_conveyor_planted_fixes_and_their_truth() -> None:
    # The second domain's planted fixes (fixtures/conveyors/generate.py): a jam guard halves
    # the jam hazard from its hour on, a recalibration changes nothing. The truth is the
    # expected predicted failures with the factor minus without it, so a factor of 1 has
    # exactly none and a guard on drives that jam has a negative one.
    from fixtures.conveyors.generate import PLANTED_FIXES, PLANTED_SHARE, generate

    timeline = generate(30, 70, seed=4, plant=PLANTED_FIXES)
    planted = timeline.planted
    assert planted is not None
    logged = timeline.maintenance[timeline.maintenance["action"].isin(["jam_guard",
                                                                       "sensor_recalibration"])]
    assert (logged.groupby("action")["drive"].nunique() == round(PLANTED_SHARE * 30)).all()
    assert planted.truth("sensor_recalibration", 4) == 0.0
    assert planted.truth("jam_guard", 4) < 0
    plain = generate(30, 70, seed=4)
    assert plain.planted is None
    assert not plain.maintenance["action"].isin(["jam_guard"]).any()


def test_comparing_within_groups_keeps_each_treated_entity_beside_its_own_group() -> None:
    # Ten entities in three groups (A: E00-E03, B: E04-E07, C: E08-E09). Actions: E00 and E04
    # in week 10, E05 in week 12, E08 and E09 in week 15; 6 weeks either side. Worked by
    # hand: over the fleet, week 10's two treated are compared with the five entities without
    # an action in weeks 4-16 (E01-E03, E06, E07). Within groups, week 10 makes one block per
    # group (E00 beside E01-E03; E04 beside E06-E07), week 12 one (E05 beside E06-E07: E04
    # acted inside its window), and C's two, treated in one week, have no untreated twin.
    inputs = _uniform_logs(30, [10, None, None, None, 10, 12, None, None, 15, 15])
    panel = entity_weeks(_minimal_spec().timeline, inputs)  # type: ignore[arg-type]
    assert list(panel.names) == [f"E{i:02d}" for i in range(10)]
    fleet = stack(panel, "service", Window())
    first = fleet.cohort == 0
    assert sorted(fleet.entity[first & fleet.treated]) == [0, 4]
    assert sorted(fleet.entity[first & ~fleet.treated]) == [1, 2, 3, 6, 7]
    assert fleet.unmatched == 0
    groups = np.array([0, 0, 0, 0, 1, 1, 1, 1, 2, 2])
    within = stack(panel, "service", Window(), groups)
    blocks = [(sorted(within.entity[(within.cohort == c) & within.treated].tolist()),
               sorted(within.entity[(within.cohort == c) & ~within.treated].tolist()))
              for c in range(within.cohort_weeks.size)]
    assert sorted(blocks) == [([0], [1, 2, 3]), ([4], [6, 7]), ([5], [6, 7])]
    assert within.unmatched == 2


def test_comparing_within_a_grouping_needs_the_attributes() -> None:
    inputs = _uniform_logs(30, [10, None, None, None])
    with pytest.raises(DataError, match="compare within 'store' needs the attributes table"):
        study(_minimal_spec(), inputs, EffectOptions(bootstrap=99, compare_within="store"))


def test_fleet_compares_across_the_fleet_whatever_the_config_says() -> None:
    # The planted config compares within stores; "fleet" overrides it, and the result is the
    # one of a config without compare_within.
    timeline, _ = planted_timeline(cases=60, days=240, seed=3)
    inputs = _inputs(timeline)
    forced = study(_spec(), inputs, EffectOptions(bootstrap=99, compare_within="fleet")).table
    plain = study(_spec(within=None), inputs, EffectOptions(bootstrap=99)).table
    assert (forced["compared_within"] == "fleet").all()
    pd.testing.assert_frame_equal(forced, plain)
    within = study(_spec(), inputs, EffectOptions(bootstrap=99)).table
    assert (within["compared_within"] == "store_id").all()
