"""Timeline configs and logs that a new user gets slightly wrong: caught, with what to write.

A typo in a failure type or an action kind, a failure log left out, a built feature's name
misspelt or a key that does not exist would each build a table without a word: fewer
positives, a feature empty everywhere, no positive at all. Each must stop with one line that
names the valid values, closest first. The logs are the demo's (fixtures/demo/timeline.py).
"""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from causeline.cli import main
from fixtures.demo.timeline import generate_timeline, write_timeline

CONFIG = Path(__file__).resolve().parents[2] / "fixtures" / "demo" / "timeline.yaml"


@pytest.fixture(scope="module")
def logs(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("logs")
    write_timeline(generate_timeline(cases=12, days=60), folder)  # both maintenance kinds
    return folder


def config_with(tmp_path: Path, change) -> Path:  # type: ignore[no-untyped-def]
    data = yaml.safe_load(CONFIG.read_text("utf-8"))
    change(data)
    path = tmp_path / "config.yaml"
    path.write_text(yaml.safe_dump(data), "utf-8")
    return path


def build(config: Path, logs: Path, tmp_path: Path, capsys, *skip: str) -> tuple[int, str]:  # type: ignore[no-untyped-def]
    flags = {"--readings": "readings", "--failures": "excursions", "--actions": "maintenance",
             "--attributes": "cases"}
    args = ["build", "--config", str(config), "--out", str(tmp_path / "snapshots.parquet")]
    for flag, name in flags.items():
        if flag not in skip:
            args += [flag, str(logs / f"{name}.parquet")]
    code = main(args)
    return code, capsys.readouterr().err.strip()


def test_the_demo_config_builds(logs, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    assert build(CONFIG, logs, tmp_path, capsys)[0] == 0


def test_a_failure_type_that_never_occurs_names_the_types_in_the_log(  # type: ignore[no-untyped-def]
    logs, tmp_path, capsys
) -> None:
    # The demo's excursion log holds the types 'warm' and 'brief'; 'warmm' is a typo.
    config = config_with(tmp_path, lambda d: d["timeline"]["failures"].update(types=["warmm"]))
    code, err = build(config, logs, tmp_path, capsys)
    assert code == 2
    assert "failures.types: 'warmm' never occurs" in err
    assert "holds 'warm', 'brief' (closest first)" in err
    assert not (tmp_path / "snapshots.parquet").exists()


def test_an_action_kind_that_never_occurs_is_an_error(logs, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    config = config_with(tmp_path, lambda d: d["timeline"]["actions"].update(
        kinds=["coil_cleaning", "firmware_upgrade"]))
    code, err = build(config, logs, tmp_path, capsys)
    assert code == 2
    assert "actions.kinds: 'firmware_upgrade' never occurs" in err
    assert err.index("'firmware_update'") < err.index("'coil_cleaning'")  # closest first


def test_a_missing_failure_log_is_an_error_unless_the_config_says_none(  # type: ignore[no-untyped-def]
    logs, tmp_path, capsys
) -> None:
    code, err = build(CONFIG, logs, tmp_path, capsys, "--failures")
    assert code == 2 and "give the failure log (--failures)" in err
    assert "failures.optional: true" in err
    optional = config_with(tmp_path, lambda d: d["timeline"]["failures"].update(optional=True))
    assert build(optional, logs, tmp_path, capsys, "--failures")[0] == 0


def test_a_misspelt_built_feature_suggests_the_name(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    def misspell(data: dict) -> None:
        data["features"][0]["name"] = "suction_presure_kpa__last_4h"

    config = config_with(tmp_path, misspell)
    code = main(["train", "--config", str(config), "--data", str(tmp_path / "x.csv"),
                 "--out", str(tmp_path / "bundle")])
    err = capsys.readouterr().err
    assert code == 2
    assert "'suction_presure_kpa__last_4h' is not a column the timeline section builds" in err
    assert "did you mean 'suction_pressure_kpa__last_4h'?" in err
    assert "--list-features" in err


def test_unknown_keys_list_the_valid_ones_and_no_class_names(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    config = config_with(tmp_path, lambda d: d["timeline"].update(downtime={"after": "12h"}))
    assert main(["build", "--config", str(config), "--list-features"]) == 2
    err = capsys.readouterr().err
    assert "at timeline.downtime: unknown key 'downtime' (did you mean 'down'?)" in err
    assert "valid keys here: clock, unit, readings, failures" in err
    config = config_with(tmp_path, lambda d: d["timeline"].update(down="12h"))
    assert main(["build", "--config", str(config), "--list-features"]) == 2
    err = capsys.readouterr().err
    assert "at timeline.down: expected a mapping with keys after_failure" in err
    assert "DownRule" not in err and "instance of" not in err


def test_list_features_works_before_any_feature_is_chosen(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    config = config_with(tmp_path, lambda d: d.update(features=[], reason_codes=[]))
    assert main(["build", "--config", str(config), "--list-features"]) == 0
    names = capsys.readouterr().out.split()
    assert "suction_pressure_kpa__mean_24h" in names and "failures_before" in names


def test_the_failure_log_flag_has_one_name(logs, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    # --events names the events rootcause groups; the failure log is --failures everywhere.
    code = main(["build", "--config", str(CONFIG), "--readings", str(logs / "readings.parquet"),
                 "--events", str(logs / "excursions.parquet"), "--out", str(tmp_path / "x.csv")])
    assert code == 2
    assert "the failure log is given with --failures" in capsys.readouterr().err
