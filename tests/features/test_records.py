"""Features built straight from JSON-like records equal those built from a table of them.

The scoring path builds its few events' features with ``FeatureBuilder.transform_records``;
batch jobs build theirs from a pandas DataFrame with ``transform``. The DataFrame is the
reference here: each record set goes through both, and values (to the bit, NaN for NaN) and
row problems must match. The AI4I 2020 bundle has derived features (its config's ``expr:``),
the demo bundle categorical ones; the odd values take the records' way back through columns.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
import pytest

from causeline.service.bundle.load import Bundle
from causeline.service.errors import DataError


def records_of(bundle: Bundle, table: pd.DataFrame, rows: int) -> list[dict[str, Any]]:
    """The first ``rows`` rows' required columns as JSON gives them (ints, floats, None, text)."""
    part = table[bundle.builder.required_columns].head(rows)
    return json.loads(part.to_json(orient="records"))


def assert_same(bundle: Bundle, records: list[dict[str, Any]]) -> None:
    fast = bundle.builder.transform_records(records)
    reference = bundle.builder.transform(pd.DataFrame.from_records(records))
    assert np.array_equal(fast.values, reference.values, equal_nan=True)
    assert fast.problems == reference.problems
    assert fast.names == reference.names


@pytest.mark.parametrize("which", ["demo", "ai4i"])
def test_records_give_the_tables_features(
    which: str, request: pytest.FixtureRequest,
) -> None:
    bundle: Bundle = request.getfixturevalue(f"{which}_bundle")
    table: pd.DataFrame = request.getfixturevalue(f"{which}_table")
    records = records_of(bundle, table, 12)
    assert_same(bundle, records)
    assert_same(bundle, records[:1])
    # Nulls, whole numbers and, for categories, an unknown one and a number.
    numeric = [name for name in bundle.builder.required_columns
               if isinstance(records[0][name], int | float)]
    text = [name for name in bundle.builder.required_columns
            if isinstance(records[0][name], str)]
    records[0][numeric[0]] = None
    records[1][numeric[-1]] = 3
    if text:
        records[2][text[0]] = "no such category"
        records[3][text[0]] = None
        records[4][text[0]] = 7
    assert_same(bundle, records)


@pytest.mark.parametrize("odd", ["12.5", "not a number", True, math.inf, 10**400])
def test_odd_values_take_the_way_through_columns(
    demo_bundle: Bundle, demo_table: pd.DataFrame, odd: Any,
) -> None:
    records = records_of(demo_bundle, demo_table, 4)
    name = next(name for name in demo_bundle.builder.required_columns
                if isinstance(records[0][name], float))
    records[1][name] = odd
    assert_same(demo_bundle, records)


def test_a_missing_column_is_named(demo_bundle: Bundle, demo_table: pd.DataFrame) -> None:
    records = records_of(demo_bundle, demo_table, 3)
    name = demo_bundle.builder.required_columns[0]
    del records[2][name]
    with pytest.raises(DataError, match=f"missing column '{name}'"):
        demo_bundle.builder.transform_records(records)
