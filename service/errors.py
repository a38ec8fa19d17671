"""Errors a user can act on, and problems found in one row of an input.

Each error carries a one-line message that names what is wrong (a key, a column, a file); the
command line prints it without a traceback and the HTTP layer turns it into problem details.
"""

from dataclasses import dataclass


class CauselineError(Exception):
    """Base class for errors shown to users as one line."""


class ConfigError(CauselineError):
    """A data-set config (or the spec inside a bundle) is invalid."""


class DataError(CauselineError):
    """An input table does not fit the config or bundle it is used with."""


class BundleError(CauselineError):
    """A bundle is missing, incomplete, tampered with or of an unknown schema."""


def first_line(exc: BaseException) -> str:
    """An exception's message cut to its first line (its type name when it has none)."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def quoted(text: str, limit: int = 60) -> str:
    """``text`` in quotes for a message, cut at ``limit`` characters: a message never echoes a
    megabyte a client sent."""
    return repr(text if len(text) <= limit else text[:limit] + "...")


@dataclass(frozen=True)
class RowProblem:
    """Something wrong with one cell: ``row`` is the position in the input table.

    Collected per row rather than raised, so that callers decide: training refuses the table,
    batch jobs set the row aside or score it with a warning, the HTTP layer answers 422.
    """

    row: int
    column: str
    message: str
