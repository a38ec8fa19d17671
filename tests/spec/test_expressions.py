"""Derived-feature expressions: arithmetic only, never code."""

from __future__ import annotations

import numpy as np
import pytest

from causeline.service.errors import ConfigError
from causeline.service.spec.expressions import parse_expression


def test_arithmetic_matches_numpy() -> None:
    expr = parse_expression("torque * speed * 2 * 3.141592653589793 / 60 - -1 + wear ** 2")
    columns = {"torque": np.array([40.0, 50.0]), "speed": np.array([1500.0, 1400.0]),
               "wear": np.array([3.0, 0.5])}
    expected = columns["torque"] * columns["speed"] * 2 * np.pi / 60 + 1 + columns["wear"] ** 2
    np.testing.assert_allclose(expr.evaluate(columns), expected, rtol=1e-15)
    assert expr.names == {"torque", "speed", "wear"}


def test_division_by_zero_gives_inf_not_error() -> None:
    out = parse_expression("a / b").evaluate({"a": np.array([1.0, 0.0]), "b": np.zeros(2)})
    assert np.isinf(out[0]) and np.isnan(out[1])


@pytest.mark.parametrize(
    ("source", "what"),
    [
        ("__import__('os').system('true')", "function call"),
        ("a.__class__", "attribute access"),
        ("a[0]", "indexing"),
        ("a if b else c", "IfExp"),
        ("a < b", "Compare"),
        ("lambda: 1", "Lambda"),
        ("'text'", "only numbers"),
        ("True + a", "only numbers"),
        ("a // b", "FloorDiv"),
    ],
)
def test_anything_but_arithmetic_is_refused(source: str, what: str) -> None:
    with pytest.raises(ConfigError, match=what):
        parse_expression(source)


def test_syntax_error_and_size_limits() -> None:
    with pytest.raises(ConfigError, match="not valid arithmetic"):
        parse_expression("a +")
    with pytest.raises(ConfigError, match="longer than"):
        parse_expression("a+" * 300 + "a")
    with pytest.raises(ConfigError, match="empty"):
        parse_expression("  ")
