"""The report kit: pages escape what they show, charts put marks where their values say.

Positions are checked with plain arithmetic on the SVG's own coordinates (a point on y = x must
sit on the drawn diagonal; a bar twice as long as another for twice the value), so the tests do
not depend on the exact layout.
"""

from __future__ import annotations

import re
from pathlib import Path

import jinja2
import numpy as np
import pandas as pd
import pytest

from causeline.service.report import charts, render_page, write_page

NASTY = '<script>alert("x")</script>'


def _floats(pattern: str, svg: str) -> list[tuple[float, ...]]:
    found = re.findall(pattern, str(svg))
    return [tuple(float(v) for v in ((m,) if isinstance(m, str) else m)) for m in found]


def test_ticks_are_round_and_cover_the_range() -> None:
    # 1, 2 or 5 times a power of ten apart (the common "nice numbers" rule for chart axes).
    assert charts.ticks(0.0, 1.0) == [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]
    ticks = charts.ticks(-3.0, 7.0)
    steps = np.diff(ticks)
    assert np.allclose(steps, steps[0]) and steps[0] in (1.0, 2.0, 5.0)
    assert ticks[0] <= -3.0 < ticks[1] and ticks[-2] < 7.0 <= ticks[-1]


def test_every_chart_escapes_its_text() -> None:
    frame = pd.DataFrame({NASTY: [0.5, 0.2]}, index=[NASTY, "b"])
    drawn = [
        charts.heatmap(frame),
        charts.strips(frame),
        charts.bars([NASTY], [1.0], reference=[0.5], reference_name=NASTY),
        charts.intervals([NASTY], [1.0], [0.5], [1.5], reference=[0.2], reference_name=NASTY),
        charts.lines([0.1, 0.2], {NASTY: [0.1, 0.3]}, x_name=NASTY, y_name=NASTY),
    ]
    for svg in drawn:
        assert "<script" not in svg
        assert "&lt;script&gt;" in svg


def test_bars_are_proportional_to_their_values() -> None:
    svg = charts.bars(["a", "b"], [1.0, 2.0])
    widths = [w for (w,) in _floats(r'<rect x="[\d.]+" y="\d+" width="([\d.]+)" height="13"',
                                    svg)]
    assert len(widths) == 2
    assert widths[1] == pytest.approx(2 * widths[0], rel=0.01)


def test_a_mark_sits_where_a_bar_of_its_value_ends() -> None:
    svg = charts.bars(["a", "b"], [0.02, 0.6], marks=[("watch", 0.1), ("retrain", 0.6)])
    ((x0, width),) = _floats(r'<rect x="([\d.]+)" y="\d+" width="([\d.]+)" height="13" '
                             r'fill="#0f6e6a"><title>b', svg)
    lines = dict(_floats(r'<line x1="([\d.]+)" x2="([\d.]+)" y1="\d+" y2="\d+" '
                         r'stroke="#c98a12"', svg))
    assert len(lines) == 2
    assert max(lines) == pytest.approx(x0 + width, abs=0.2)  # retrain 0.6 at the end of b
    assert min(lines) - x0 == pytest.approx(width / 6, abs=0.2)  # watch 0.1 a sixth of it
    # The scale reaches a mark past every bar: 0.25 is drawn, not clipped.
    svg = charts.bars(["a"], [0.01], marks=[("retrain", 0.25)])
    assert "retrain 0.25" in svg


def test_an_interval_holds_its_estimate_and_a_blank_row_says_so() -> None:
    svg = charts.intervals(["a", "b"], [1.0, np.nan], [0.0, np.nan], [3.0, np.nan])
    ((x1, x2),) = _floats(r'<line x1="([\d.]+)" x2="([\d.]+)" y1="\d+" y2="\d+" '
                          r'stroke="#0f6e6a"', svg)
    ((cx,),) = _floats(r'<circle cx="([\d.]+)" cy="\d+" r="4.5"', svg)
    assert x1 < cx < x2
    assert cx - x1 == pytest.approx((x2 - x1) / 3, rel=0.02)
    assert "no estimate" in svg


def test_a_calibrated_point_sits_on_the_diagonal() -> None:
    svg = charts.lines([0.1, 0.5, 0.9], {"observed": [0.1, 0.5, 0.9]}, diagonal=True)
    ((x1, y1, x2, y2),) = _floats(r'<line x1="([\d.]+)" y1="([\d.]+)" x2="([\d.]+)" '
                                  r'y2="([\d.]+)" stroke="#5b6b75" stroke-dasharray', svg)
    points = _floats(r'<circle cx="([\d.]+)" cy="([\d.]+)" r="3"', svg)
    assert len(points) == 3
    for cx, cy in points:
        on_line = y1 + (y2 - y1) * (cx - x1) / (x2 - x1)
        assert cy == pytest.approx(on_line, abs=0.2)


def test_a_blank_value_breaks_the_line() -> None:
    svg = charts.lines(["w1", "w2", "w3", "w4", "w5"], {"rate": [1, 2, np.nan, 3, 4]})
    assert svg.count("<polyline") == 2
    assert svg.count('r="3"') == 4


def test_pages_escape_values_inline_their_style_and_fetch_nothing(tmp_path: Path) -> None:
    out = tmp_path / "page.html"
    write_page(out, "base.html", title=NASTY, subtitle="s", facts=[(NASTY, "1")],
               caution="Follow local codes.")
    page = out.read_text("utf-8")
    assert "<script" not in page and 'src="' not in page and "<link" not in page
    assert page.count("&lt;script&gt;") >= 3  # <title>, <h1>, the fact
    assert "--accent" in page  # the style sheet is inlined
    assert "Follow local codes." in page


def test_a_missing_value_fails_the_render_and_writes_nothing(tmp_path: Path) -> None:
    with pytest.raises(jinja2.UndefinedError):
        render_page("rootcause.html", title="t")
    with pytest.raises(jinja2.UndefinedError):
        write_page(tmp_path / "page.html", "rootcause.html", title="t")
    assert list(tmp_path.iterdir()) == []
