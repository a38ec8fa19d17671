"""Render a page template with the shared style sheet and filters, and write it atomically."""

from __future__ import annotations

import math
from functools import cache
from pathlib import Path
from typing import Any

import jinja2
import pandas as pd

from causeline.service.files.storage import atomic_file

HERE = Path(__file__).resolve().parent


def when(value: Any) -> str:
    """An ISO time as a short 'YYYY-MM-DD HH:MM' (UTC); '' for nothing."""
    if not isinstance(value, str) or not value:
        return ""
    try:
        stamp = pd.Timestamp(value)
    except ValueError:
        return value
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC")
    return stamp.strftime("%Y-%m-%d %H:%M")


def blank(value: Any) -> bool:
    """True for None, NaN and the empty string: cells a page shows as empty."""
    if value is None:
        return True
    if isinstance(value, float):
        return math.isnan(value)
    return isinstance(value, str) and not value


def number(value: Any, fmt: str = "{:,.0f}") -> str:
    """A number through ``fmt``; '' for a blank cell."""
    return "" if blank(value) else fmt.format(float(value))


def percent(value: Any, digits: int = 1) -> str:
    """A share 0..1 as a percentage with ``digits`` decimals; '' for a blank cell."""
    return "" if blank(value) else f"{100 * float(value):.{digits}f} %"


def text(value: Any) -> str:
    """A cell as text; '' for a blank cell (so templates never print 'nan' or 'None')."""
    return "" if blank(value) else str(value)


@cache
def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(HERE / "templates"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters.update(when=when, number=number, percent=percent, text=text)
    env.tests["blank"] = blank
    return env


def render_page(template: str, **context: Any) -> str:
    """The page as one HTML string. ``title`` is required; ``subtitle``, ``facts`` (a list of
    (label, value) pairs) and ``caution`` are shown by the base template when given."""
    context.setdefault("subtitle", "")
    context.setdefault("facts", [])
    context.setdefault("caution", "")
    style = (HERE / "style.css").read_text("utf-8")
    return environment().get_template(template).render(style=style, **context)


def write_page(path: Path, template: str, **context: Any) -> None:
    """Render and write the page atomically (a failed render leaves no file behind)."""
    page = render_page(template, **context)
    with atomic_file(path) as temporary:
        temporary.write_text(page, "utf-8")
