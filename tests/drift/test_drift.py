"""The drift job end to end on the demo fleet: planted shifts against fresh unchanged draws.

The truth is planted in the generator (``fixtures/demo/generate.py``, ``SHIFTS``): what each
shift changes, and so which features and reason codes it touches. Fresh seeds are other fleets
of the same process; they must come out ``ok``. The false-alarm rate over 20 seeds and both
domains is measured by ``bench/drift.py --study`` (figures in docs/drift.md).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from causeline.cli import main
from causeline.service.bundle.load import Bundle
from causeline.service.bundle.manifest import CHECKSUMS, MANIFEST
from causeline.service.drift.job import DriftOptions, run_drift
from causeline.service.drift.tally import CodeSample, Scorer
from causeline.service.explain.reasons import carried
from causeline.service.files.checksum import checksum_text
from causeline.service.files.predlog import PredictionLogWriter
from fixtures.demo.generate import SHIFTS, generate

LABEL = "went_warm_24h"
SAMPLE = 10_000  # reason codes on a sample of a 29,200-event window: the path long windows take


def flagged(result, area: str, column: str) -> set[str]:  # type: ignore[no-untyped-def]
    table = result.tables[area]
    return set(table[(table["level"] != "ok") & table["decides"].astype(bool)][column])


@pytest.fixture(scope="module")
def window(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    folder = tmp_path_factory.mktemp("drift")

    def write(seed: int, shift: str | None = None) -> Path:
        path = folder / f"{seed}-{shift}.parquet"
        if not path.exists():
            generate(cases=80, seed=seed, shift=shift).to_parquet(path, index=False)
        return path

    return write


def test_an_unchanged_fleet_is_ok(demo_bundle: Bundle, window) -> None:  # type: ignore[no-untyped-def]
    result = run_drift(demo_bundle, window(31), None,
                       DriftOptions(label=LABEL, replicates=50, code_sample=SAMPLE))
    assert result.verdict.level == "ok", result.verdict.decided_by
    assert result.summary["calibration"]["rows"] == 80 * 365
    # The demo spec names case_id as its entity: the bootstrap draws cases whole.
    assert result.summary["calibration"]["bootstrap_draws"] == "entities"
    assert result.summary["codes"]["events_explained"] == SAMPLE
    assert result.summary["codes"]["sampled"]


@pytest.mark.parametrize("shift", sorted(SHIFTS))
def test_a_planted_shift_is_flagged_on_what_it_touched_only(
    demo_bundle: Bundle, window, shift: str  # type: ignore[no-untyped-def]
) -> None:
    result = run_drift(demo_bundle, window(31, shift), None, DriftOptions(code_sample=SAMPLE))
    touched = SHIFTS[shift]
    features = flagged(result, "features", "feature")
    assert result.verdict.level in ("watch", "retrain")
    assert features and features <= set(touched["features"]), features
    assert flagged(result, "codes", "code") <= set(touched["codes"])


def test_carried_codes_are_the_explanations_reasons(demo_bundle: Bundle, demo_table) -> None:  # type: ignore[no-untyped-def]
    from causeline.service.explain.explainer import Explainer

    rows = demo_table.head(400)
    explanation = Explainer(demo_bundle).explain(rows)
    scorer = Scorer.of(demo_bundle)
    scored = scorer.score(explanation.features.values)
    index = scorer.catalogue.index
    for row, reasons in enumerate(explanation.reasons):
        assert {index[r.code] for r in reasons} == set(scored.carried[row].nonzero()[0])
    assert (scored.probability == explanation.probability).all()
    # The cheap path every event of a window takes: the trees' own output, same probability.
    np.testing.assert_allclose(scorer.probability(explanation.features.values),
                               explanation.probability, rtol=1e-9, atol=1e-12)
    assert carried(explanation.code_contributions, 4, 0.05).sum() == sum(
        len(r) for r in explanation.reasons)


def test_cli_writes_the_folder_and_exits_by_verdict(demo_bundle: Bundle, window,  # type: ignore[no-untyped-def]
                                                    tmp_path: Path, capsys) -> None:
    out = tmp_path / "drift"
    status = main(["drift", "--bundle", str(demo_bundle.path), "--input",
                   str(window(31, "heat")), "--out", str(out), "--quiet", "--label", LABEL])
    summary = json.loads((out / "summary.json").read_text())
    assert status == {"watch": 10, "retrain": 11}[summary["verdict"]]
    for name in ("features", "codes", "scores", "checks", "calibration"):
        assert len(pd.read_csv(out / f"{name}.csv"))
    assert any(d["subject"] == "store_ambient_c" for d in summary["decided_by"])
    assert "verdict:" in capsys.readouterr().out


def test_a_bundle_without_a_reference_gets_one_line(demo_bundle: Bundle, window,  # type: ignore[no-untyped-def]
                                                    tmp_path: Path, capsys) -> None:
    old = tmp_path / "old"
    shutil.copytree(demo_bundle.path, old)
    raw = json.loads((old / MANIFEST).read_text())
    del raw["reference"]
    (old / MANIFEST).write_text(json.dumps(raw))
    (old / "reference.json").unlink()
    (old / CHECKSUMS).write_text(checksum_text(old, [MANIFEST, "model.txt", "MODEL_CARD.md"]))
    status = main(["drift", "--bundle", str(old), "--input", str(window(31)),
                   "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert status == 2 and "keeps no drift reference" in err and len(err.splitlines()) == 1


def test_the_prediction_log_with_a_window(demo_bundle: Bundle, demo_table, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    log = tmp_path / "log"
    writer = PredictionLogWriter(log)
    events = demo_table.head(300).drop(columns=[LABEL]).to_dict("records")
    stamps = ["2026-01-01T10:00:00+00:00", "2026-01-02T10:00:00+00:00"]
    for day, stamp in enumerate(stamps):
        writer.append([{"logged_at": stamp, "model": demo_bundle.name, "version": "x", "id": str(i),
                        "probability": 0.1, "decision": False, "reasons": [], "event": e}
                       for i, e in enumerate(events[day * 150:(day + 1) * 150])])
    writer.append([{"logged_at": stamps[0], "model": "another", "event": events[0]}])
    writer.close()
    with open(next(log.glob("segment-*.jsonl")), "a") as handle:
        handle.write("not json\n")
    result = run_drift(demo_bundle, log, tmp_path / "out",
                       DriftOptions(since="2026-01-02", until="2026-01-03"))
    window = result.summary["window"]
    assert window["events"] == 150 and window["prediction_log"]
    assert window["other_models"] == 1 and window["unreadable_log_lines"] == 1
    assert (tmp_path / "out" / "summary.json").exists()


def test_the_page_is_one_offline_file_that_escapes_and_shows_the_verdict(  # type: ignore[no-untyped-def]
    demo_bundle: Bundle, window, tmp_path: Path
) -> None:
    # A category value is whatever the logs hold: markup in it must reach the page as text.
    nasty = '<script>alert("x")</script>'
    frame = pd.read_parquet(window(31, "heat"))
    frame.loc[:599, "controller_firmware"] = nasty  # 2 % of the rows
    data = tmp_path / "window.parquet"
    frame.to_parquet(data, index=False)
    result = run_drift(demo_bundle, data, tmp_path / "out", DriftOptions(label=LABEL,
                                                                        replicates=20))
    page = (tmp_path / "out" / "report.html").read_text("utf-8")
    assert "controller_firmware" in {d["subject"] for d in result.verdict.decided_by}
    lowered = page.lower()
    for fetched in ("<script", " src=", "<link", "@import", "url("):
        assert fetched not in lowered, fetched
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;" in page
    verdict = result.verdict.level
    assert f'<span class="badge {verdict}" style="font-size:16px' in page
    for decided in result.verdict.decided_by:
        assert str(decided["subject"]) in page
    assert page.count("<svg") >= 6  # PSI, outside, codes, scores, calibration curve and deciles
    assert "licensed practice" in page and "FDA Food Code" in page


def test_the_code_sample_is_uniform_and_without_repeats() -> None:
    # Every row of a stream read in uneven chunks must be equally likely to be kept: counts of
    # kept rows per tenth of the stream over many seeds against a uniform law (chi-square).
    rows, size, seeds = 10_000, 1_000, 200
    per_tenth = np.zeros(10)
    for seed in range(seeds):
        sample = CodeSample(size, seed)
        for start in range(0, rows, 700):
            sample.add(np.arange(start, min(start + 700, rows), dtype=float)[:, None])
        kept = sample.rows()[:, 0]
        assert kept.size == size and np.unique(kept).size == size and sample.sampled
        per_tenth += np.bincount((kept // (rows / 10)).astype(int), minlength=10)
    assert stats.chisquare(per_tenth).pvalue > 0.001
    small = CodeSample(size, 0)
    small.add(np.arange(10, dtype=float)[:, None])
    assert not small.sampled and sorted(small.rows()[:, 0]) == list(range(10))


def test_sampled_code_shares_agree_with_every_event_within_sampling_error(  # type: ignore[no-untyped-def]
    demo_bundle: Bundle, window
) -> None:
    full = run_drift(demo_bundle, window(31), None, DriftOptions(code_sample=None))
    part = run_drift(demo_bundle, window(31), None, DriftOptions(code_sample=SAMPLE))
    events = full.summary["window"]["events"]
    assert full.summary["codes"]["events_explained"] == events
    assert not full.summary["codes"]["sampled"]
    a, b = full.tables["codes"].set_index("code"), part.tables["codes"].set_index("code")
    p = a["share"]
    # Sampling without replacement: binomial spread times the finite-population correction;
    # four of those (about 1 in 16,000 per code by chance).
    spread = np.sqrt(p * (1 - p) / SAMPLE * (1 - SAMPLE / events))
    assert ((b["share"] - p).abs() <= 4 * spread + 1e-12).all()
    assert (b["share"] != p).any()  # the sample is not every event
    # Scores count every event either way.
    pd.testing.assert_frame_equal(full.tables["scores"], part.tables["scores"])
