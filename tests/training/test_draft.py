"""``causeline draft``: a first config from the user's own table that trains as it is.

Checked on the invented demo table (whose hidden truth columns include two that give the
answer away: the warm minutes of the next 24 h, and the planted cause, filled in only for
events) and on the public AI4I 2020 file (Matzka 2020), whose failure-mode flags TWF, HDF, PWF
and OSF are set only on failed runs (the data set's own description) and so leak the target;
RNF is not: most of its runs did not fail, as the published file has it.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
import yaml

from causeline.cli import main
from causeline.training.config import load_config
from causeline.training.pipeline import train
from tests.conftest import FIXTURES


@pytest.fixture(scope="module")
def demo_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from fixtures.demo.generate import generate

    path = tmp_path_factory.mktemp("draft") / "cases.csv"
    generate(cases=60, days=200, seed=4).to_csv(path, index=False)
    return path


def test_the_demo_draft_trains_and_leaves_out_what_gives_the_answer_away(  # type: ignore[no-untyped-def]
    demo_csv, tmp_path, capsys
) -> None:
    out = tmp_path / "draft.yaml"
    assert main(["draft", "--data", str(demo_csv), "--target", "went_warm_24h",
                 "--time", "snapshot_time", "--entity", "case_id", "--out", str(out)]) == 0
    said = capsys.readouterr().out
    assert "left out 'warm_minutes_next_24h'" in said and "left out 'planted_cause'" in said
    config = load_config(out)
    names = config.feature_names
    assert "warm_minutes_next_24h" not in names and "planted_cause" not in names
    assert config.feature("case_type").kind == "categorical"
    assert config.feature("suction_pressure_kpa").kind == "numeric"
    assert all(f.role == "observable" for f in config.features)
    assert not any(code.fix for code in config.reason_codes)
    covered = [name for code in config.reason_codes for name in code.features]
    assert sorted(covered) == sorted(names)  # every feature in exactly one code
    # Refrigerant loss lowers suction pressure before a case runs warm (the generator's rule).
    suction = next(c for c in config.reason_codes if "suction_pressure_kpa" in c.features)
    assert suction.direction == "low"
    train(out, demo_csv, tmp_path / "bundle")
    assert (tmp_path / "bundle" / "MODEL_CARD.md").is_file()


def test_the_ai4i_draft_leaves_out_the_failure_flags_and_trains(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    data = FIXTURES / "ai4i2020" / "ai4i2020.csv"
    out = tmp_path / "ai4i.yaml"
    assert main(["draft", "--data", str(data), "--target", "Machine failure",
                 "--out", str(out)]) == 0
    said = capsys.readouterr().out
    for flag in ("TWF", "HDF", "PWF", "OSF"):
        assert f"left out '{flag}'" in said
    assert "left out 'Product ID'" in said and "'RNF'" not in said
    text = out.read_text("utf-8")
    config = load_config(out)
    assert config.id == "UDI"  # the first column with a distinct value per row
    assert config.feature("torque_nm").source_column == "Torque [Nm]"
    assert "# range 3.8 to 76.6" in text  # Torque [Nm] in the published file
    assert main(["train", "--config", str(out), "--data", str(data),
                 "--out", str(tmp_path / "bundle")]) == 0
    printed = capsys.readouterr().out
    assert "explain new data: causeline explain --bundle" in printed


def test_the_draft_never_overwrites_and_refuses_a_target_that_is_not_binary(  # type: ignore[no-untyped-def]
    demo_csv, tmp_path, capsys
) -> None:
    out = tmp_path / "mine.yaml"
    out.write_text("keep me\n", "utf-8")
    code = main(["draft", "--data", str(demo_csv), "--target", "went_warm_24h",
                 "--out", str(out)])
    assert code == 2 and "never overwrites" in capsys.readouterr().err
    assert out.read_text("utf-8") == "keep me\n"
    code = main(["draft", "--data", str(demo_csv), "--target", "planted_causes_active",
                 "--out", str(tmp_path / "other.yaml")])
    err = capsys.readouterr().err
    # The values as the file shows them, not as numpy prints them.
    assert code == 2 and "is not binary" in err and "found 2" in err and "np.int64" not in err
    assert "(the column holds 0, 1, 2" in err


def test_training_on_a_file_with_a_header_and_no_rows_says_so(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    config = FIXTURES / "demo" / "config.yaml"
    columns = pd.read_csv(FIXTURES / "demo" / "sample.csv", nrows=0).columns
    empty = tmp_path / "empty.csv"
    empty.write_text(",".join(columns) + "\n", "utf-8")
    code = main(["train", "--config", str(config), "--data", str(empty),
                 "--out", str(tmp_path / "bundle")])
    assert code == 2 and "header but no rows" in capsys.readouterr().err
    assert yaml.safe_load(config.read_text("utf-8"))["target"] in columns
