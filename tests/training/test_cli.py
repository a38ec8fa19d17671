"""The command line: bad input stops with one line, writes nothing; bundles verify on load."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from causeline.service.bundle.load import load_bundle
from causeline.service.bundle.manifest import CHECKSUMS, MANIFEST, MODEL
from causeline.service.errors import BundleError
from tests.conftest import AI4I_CONFIG, AI4I_CSV


def run_cli(*args: str | Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "causeline", *map(str, args)],
        capture_output=True, text=True, timeout=300,
    )


def _small_ai4i(tmp_path: Path, change=None, rows: int = 3000) -> Path:  # type: ignore[no-untyped-def]
    table = pd.read_csv(AI4I_CSV).iloc[:rows].copy()
    if change is not None:
        table = change(table)
    path = tmp_path / "data.csv"
    table.to_csv(path, index=False)
    return path


def _config(tmp_path: Path, change=None) -> Path:  # type: ignore[no-untyped-def]
    config = yaml.safe_load(AI4I_CONFIG.read_text())
    if change is not None:
        change(config)
    path = tmp_path / "config.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _assert_one_line_failure(result: subprocess.CompletedProcess[str], *words: str) -> None:
    assert result.returncode == 2, result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    for word in words:
        assert word in lines[0], lines[0]


def _set(column: str, value: object):  # type: ignore[no-untyped-def]
    def change(table: pd.DataFrame) -> pd.DataFrame:
        table[column] = table[column].astype(object)
        table.loc[table.index[5], column] = value
        return table

    return change


BAD_DATA = {
    "missing column": (lambda t: t.drop(columns=["Torque [Nm]"]), ["'Torque [Nm]'"]),
    "non-binary target": (_set("Machine failure", 2), ["'Machine failure'", "not binary"]),
    "too few events": (lambda t: t.assign(**{"Machine failure": 0}).pipe(
        lambda d: d.assign(**{"Machine failure": np.r_[np.ones(3), np.zeros(len(d) - 3)]})),
        ["too few events"]),
    "constant feature": (lambda t: t.assign(**{"Tool wear [min]": 7}), ["'tool_wear_min'",
                                                                        "constant"]),
    "all-missing feature": (lambda t: t.assign(**{"Air temperature [K]": np.nan}),
                            ["'air_temp_k'", "missing on every row"]),
    "unknown category": (_set("Type", "X"), ["'Type'", "unknown category 'X'"]),
    "word in a number column": (_set("Torque [Nm]", "forty"), ["'Torque [Nm]'", "not a number"]),
    "duplicate id": (_set("UDI", 1), ["'UDI'", "repeats"]),
}


@pytest.mark.parametrize("case", sorted(BAD_DATA))
def test_bad_data_stops_with_one_line_and_no_bundle(tmp_path: Path, case: str) -> None:
    change, words = BAD_DATA[case]
    data = _small_ai4i(tmp_path, change)
    out = tmp_path / "bundle"
    result = run_cli("train", "--config", AI4I_CONFIG, "--data", data, "--out", out)
    _assert_one_line_failure(result, *words)
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".bundle")]


BAD_CONFIG = {
    "unknown key": (lambda c: c.update(colour="blue"), ["colour", "unknown key"]),
    "bad role": (lambda c: c["features"][1].update(role="tunable"), ["features[1].role"]),
    "code on unknown feature": (
        lambda c: c["reason_codes"][0].update(features=["nope"]), ["reason_codes[0].features",
                                                                    "'nope'"]),
    "target on observable": (
        lambda c: c["reason_codes"][0]["fix"].update(targets={"temp_gap_k": 10}),
        ["reason_codes[0].fix.targets", "observable"]),
    "expression with a call": (
        lambda c: c["features"][6].update(expr="__import__('os').getcwd()"),
        ["features[6]", "function call"]),
    "expression with attribute": (
        lambda c: c["features"][6].update(expr="air_temp_k.real"),
        ["features[6]", "attribute access"]),
    "both thresholds": (
        lambda c: c["training"].update(threshold={"cost_ratio": 3, "precision": 0.5}),
        ["training.threshold", "exactly one"]),
    "unsafe template": (
        lambda c: c["reason_codes"][0].update(text="{temp_gap_k.__class__}"),
        ["reason_codes[0].text"]),
}


@pytest.mark.parametrize("case", sorted(BAD_CONFIG))
def test_bad_config_names_the_key(tmp_path: Path, case: str) -> None:
    change, words = BAD_CONFIG[case]
    config = _config(tmp_path, change)
    out = tmp_path / "bundle"
    result = run_cli("train", "--config", config, "--data", AI4I_CSV, "--out", out)
    _assert_one_line_failure(result, *words)
    assert not out.exists()


def test_yaml_tags_cannot_build_objects(tmp_path: Path) -> None:
    path = tmp_path / "config.yaml"
    path.write_text("name: !!python/object/apply:os.system ['true']\n")
    result = run_cli("train", "--config", path, "--data", AI4I_CSV, "--out", tmp_path / "b")
    _assert_one_line_failure(result, "not valid YAML")


@pytest.fixture(scope="module")
def trained(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("cli") / "bundle"
    result = run_cli("train", "--config", AI4I_CONFIG, "--data", AI4I_CSV, "--out", out)
    assert result.returncode == 0, result.stderr
    assert "held-out roc_auc" in result.stdout
    return out


def test_bundle_is_data_only(trained: Path) -> None:
    names = sorted(p.name for p in trained.iterdir())
    assert names == sorted([CHECKSUMS, MANIFEST, MODEL, "MODEL_CARD.md", "reference.json"])
    json.loads((trained / "reference.json").read_text())  # the drift reference: plain JSON
    manifest = json.loads((trained / MANIFEST).read_text())
    for key in ("schema_version", "dataset", "stats", "decision", "metrics", "explainer",
                "data_fingerprint", "libraries", "calibration"):
        assert key in manifest
    assert manifest["explainer"]["output"] == "log-odds"
    assert manifest["training"]["split"]["method"] == "random"
    # The checksum file is sha256sum's own format, so coreutils can check it too.
    check = subprocess.run(["sha256sum", "-c", CHECKSUMS], cwd=trained, capture_output=True)
    assert check.returncode == 0


@pytest.mark.parametrize("victim", [MANIFEST, MODEL, CHECKSUMS])
def test_changed_byte_is_refused(tmp_path: Path, trained: Path, victim: str) -> None:
    copy = tmp_path / "copy"
    subprocess.run(["cp", "-r", trained, copy], check=True)
    data = bytearray((copy / victim).read_bytes())
    data[len(data) // 2] ^= 0x01
    (copy / victim).write_bytes(bytes(data))
    with pytest.raises(BundleError):
        load_bundle(copy)
    result = run_cli("explain", "--bundle", copy, "--input", AI4I_CSV,
                     "--out", tmp_path / "x.csv")
    _assert_one_line_failure(result)
    assert not (tmp_path / "x.csv").exists()


def test_truncated_and_missing_files_are_refused(tmp_path: Path, trained: Path) -> None:
    copy = tmp_path / "copy"
    subprocess.run(["cp", "-r", trained, copy], check=True)
    (copy / MODEL).write_bytes((copy / MODEL).read_bytes()[:1000])
    with pytest.raises(BundleError, match="checksum"):
        load_bundle(copy)
    (copy / MODEL).unlink()
    with pytest.raises(BundleError, match="missing"):
        load_bundle(copy)


def test_failed_retrain_keeps_previous_bundle(tmp_path: Path, trained: Path) -> None:
    copy = tmp_path / "copy"
    subprocess.run(["cp", "-r", trained, copy], check=True)
    before = (copy / MANIFEST).read_bytes()
    bad = _small_ai4i(tmp_path, lambda t: t.drop(columns=["Type"]))
    result = run_cli("train", "--config", AI4I_CONFIG, "--data", bad, "--out", copy)
    assert result.returncode == 2
    assert (copy / MANIFEST).read_bytes() == before
    load_bundle(copy)


def test_explain_outputs_by_suffix(tmp_path: Path, trained: Path) -> None:
    rows = pd.read_csv(AI4I_CSV).iloc[:200]
    rows["UDI"] = rows["UDI"].astype(str)
    rows.loc[rows.index[0], "UDI"] = "=HYPERLINK(\"http://x\")"
    source = tmp_path / "rows.csv"
    rows.to_csv(source, index=False)
    for suffix in ("csv", "jsonl", "parquet"):
        out = tmp_path / f"out.{suffix}"
        result = run_cli("explain", "--bundle", trained, "--input", source, "--out", out,
                         "--all-contributions")
        assert result.returncode == 0, result.stderr
    csv = pd.read_csv(tmp_path / "out.csv", dtype={"id": str})
    # OWASP CSV-injection guidance: a formula-looking cell is prefixed with a quote.
    assert csv["id"].iloc[0].startswith("'=")
    records = [json.loads(line) for line in (tmp_path / "out.jsonl").read_text().splitlines()]
    assert len(records) == 200
    parquet = pd.read_parquet(tmp_path / "out.parquet")
    for record, (_, flat) in zip(records, parquet.iterrows(), strict=True):
        total = record["base_value"] + sum(record["contributions"].values())
        flat_total = flat["base_value"] + sum(
            flat[c] for c in parquet.columns if c.startswith("contribution_"))
        assert abs(total - flat_total) < 1e-9
        assert len(record["reasons"]) <= 4
        contributions = [r["contribution"] for r in record["reasons"]]
        assert contributions == sorted(contributions, reverse=True)
