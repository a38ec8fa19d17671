"""Safe arithmetic over named columns, for derived features.

Configs and bundles may come from people other than the operator, so an expression must never run
code: it is parsed with :mod:`ast` and only numbers, names, parentheses and ``+ - * / **`` are
accepted. Anything else (calls, attribute access, subscripts, comparisons) is refused with a
message that says what was found.
"""

from __future__ import annotations

import ast
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from causeline.service.errors import ConfigError

MAX_LENGTH = 500
MAX_NODES = 200

_BINARY: dict[type[ast.operator], Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}
_UNARY: dict[type[ast.unaryop], Callable[[np.ndarray], np.ndarray]] = {
    ast.USub: np.negative,
    ast.UAdd: np.positive,
}

Evaluator = Callable[[Mapping[str, np.ndarray]], np.ndarray]


@dataclass(frozen=True)
class Expression:
    """A parsed arithmetic expression; ``names`` are the columns it reads."""

    source: str
    names: frozenset[str]
    _evaluate: Evaluator = field(repr=False, compare=False)

    def evaluate(self, columns: Mapping[str, np.ndarray]) -> np.ndarray:
        """Evaluate row-wise over float arrays; division by zero gives inf or NaN, not an error."""
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return np.asarray(self._evaluate(columns), dtype=np.float64)


def parse_expression(source: str) -> Expression:
    """Parse ``source`` or raise :class:`ConfigError` naming the construct that is not allowed."""
    if not isinstance(source, str) or not source.strip():
        raise ConfigError("expression is empty")
    if len(source) > MAX_LENGTH:
        raise ConfigError(f"expression is longer than {MAX_LENGTH} characters")
    try:
        tree = ast.parse(source.strip(), mode="eval")
    except SyntaxError as exc:
        raise ConfigError(f"expression {source!r} is not valid arithmetic: {exc.msg}") from None
    if sum(1 for _ in ast.walk(tree)) > MAX_NODES:
        raise ConfigError(f"expression {source!r} has more than {MAX_NODES} parts")
    names: set[str] = set()
    evaluate = _compile(tree.body, source, names)
    return Expression(source=source, names=frozenset(names), _evaluate=evaluate)


def _compile(node: ast.expr, source: str, names: set[str]) -> Evaluator:
    if isinstance(node, ast.Constant):
        value = node.value
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(f"expression {source!r}: only numbers are allowed as constants")
        constant = np.float64(value)
        return lambda _columns: constant
    if isinstance(node, ast.Name):
        name = node.id
        names.add(name)
        return lambda columns: columns[name]
    if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
        op = _BINARY[type(node.op)]
        left, right = _compile(node.left, source, names), _compile(node.right, source, names)
        return lambda columns: op(left(columns), right(columns))
    if isinstance(node, ast.UnaryOp) and type(node.op) in _UNARY:
        unary = _UNARY[type(node.op)]
        operand = _compile(node.operand, source, names)
        return lambda columns: unary(operand(columns))
    raise ConfigError(
        f"expression {source!r}: {_describe(node)} is not allowed; "
        "use numbers, feature names, parentheses and + - * / **"
    )


def _describe(node: ast.AST) -> str:
    if isinstance(node, ast.Call):
        return "a function call"
    if isinstance(node, ast.Attribute):
        return "attribute access"
    if isinstance(node, ast.Subscript):
        return "indexing"
    if isinstance(node, ast.BinOp | ast.UnaryOp):
        return f"the operator {type(node.op).__name__}"
    return f"{type(node).__name__}"
