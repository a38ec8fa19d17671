"""Inline SVG charts for the report pages: no scripts, every text escaped, sized to their data.

Each helper takes plain values or a data frame and returns ``Markup`` a template prints as it
is. Colours are the style sheet's (``style.css``): SVG presentation attributes cannot read CSS
variables, so the few used here are repeated below.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from html import escape

import numpy as np
import pandas as pd
from markupsafe import Markup

INK = "#1d2a33"
MUTED = "#5b6b75"
ACCENT = "#0f6e6a"
RULE = "#c9d0cc"
SECOND = "#c98a12"
# Lines after the first take these, in order (distinct in print and for most colour vision).
SERIES = (ACCENT, SECOND, "#3559a8", "#b0412e", "#6b4c9a", MUTED)
FONT = 'font-size="11" font-family="system-ui, sans-serif"'
MONO = 'font-family="ui-monospace, monospace"'


def _svg(width: float, height: float, label: str, body: list[str]) -> Markup:
    return Markup(
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height:.0f}" '
        f'role="img" aria-label="{escape(label)}" {FONT}>' + "".join(body) + "</svg>"
    )


def _empty(message: str) -> Markup:
    return Markup(f"<p>{escape(message)}</p>")


def _finite(values: Sequence[float] | np.ndarray) -> np.ndarray:
    array = np.asarray(values, dtype=float)
    return array[np.isfinite(array)]


def ticks(low: float, high: float, count: int = 5) -> list[float]:
    """Round tick values from at or below ``low`` to at or above ``high``, 1, 2 or 5 times a
    power of ten apart (callers keep those inside their axis)."""
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        return [low] if math.isfinite(low) else []
    raw = (high - low) / max(count - 1, 1)
    power = 10 ** math.floor(math.log10(raw))
    ratio = raw / power
    step = power * (1 if ratio < 1.5 else 2 if ratio < 3 else 5 if ratio < 7 else 10)
    first, last = math.floor(low / step + 1e-9), math.ceil(high / step - 1e-9)
    return [float(round(k * step, 12)) for k in range(first, last + 1)]


def _label(value: float) -> str:
    return f"{value:g}" if abs(value) < 1e6 else f"{value:.2g}"


def shade(value: float) -> str:
    """White to the accent colour as ``value`` goes from 0 to 1 (square-root scale)."""
    value = min(max(value, 0.0), 1.0)
    start, end = (255, 255, 255), (15, 110, 106)
    rgb = [round(a + (b - a) * math.sqrt(value)) for a, b in zip(start, end, strict=True)]
    return "#" + "".join(f"{c:02x}" for c in rgb)


def heatmap(matrix: pd.DataFrame, *, label: str = "heat map") -> Markup:
    """Rows x columns shaded by a value in 0..1, with the value printed as a percentage."""
    if matrix.empty:
        return _empty("Nothing to show.")
    cell_w, cell_h, left, top = 62, 26, 90, 150
    # Column labels lean right, so the last one needs room beyond the grid.
    width = left + cell_w * matrix.shape[1] + 120
    height = top + cell_h * matrix.shape[0] + 10
    out = []
    for j, column in enumerate(matrix.columns):
        x = left + j * cell_w + cell_w / 2
        out.append(
            f'<text transform="translate({x:.0f},{top - 6}) rotate(-50)" fill="{INK}">'
            f"{escape(str(column))}</text>"
        )
    for i, row in enumerate(matrix.index):
        y = top + i * cell_h
        out.append(
            f'<text x="{left - 8}" y="{y + cell_h / 2 + 4:.0f}" text-anchor="end" {MONO} '
            f'fill="{INK}">{escape(str(row))}</text>'
        )
        for j, value in enumerate(matrix.iloc[i].to_numpy(dtype=float)):
            x = left + j * cell_w
            colour = "#fff" if value > 0.45 else INK
            text = f"{100 * value:.0f}%" if value >= 0.005 else ""
            out.append(
                f'<rect x="{x}" y="{y}" width="{cell_w - 2}" height="{cell_h - 2}" '
                f'fill="{shade(value)}" stroke="#e3e7e5"/>'
                f'<text x="{x + cell_w / 2 - 1:.0f}" y="{y + cell_h / 2 + 4:.0f}" '
                f'text-anchor="middle" fill="{colour}">{text}</text>'
            )
    return _svg(width, height, label, out)


def strips(frame: pd.DataFrame, *, label: str = "counts over time",
           muted: Sequence[str] = ()) -> Markup:
    """One strip of bars per column over the (time) index, each strip on its own scale.

    Columns named in ``muted`` are drawn in grey (e.g. the events no group took)."""
    if frame.empty:
        return _empty("No times to show.")
    steps = list(frame.index)
    left, strip, gap, right = 110, 34, 8, 60
    bar = max(2.0, min(14.0, 900 / max(len(steps), 1)))
    width = left + bar * len(steps) + right
    height = (strip + gap) * frame.shape[1] + 30
    out = []
    for i, column in enumerate(frame.columns):
        counts = frame[column].to_numpy(dtype=float)
        peak = max(float(np.nanmax(counts)) if counts.size else 0.0, 1.0)
        base = i * (strip + gap) + strip
        colour = MUTED if str(column) in muted else ACCENT
        out.append(
            f'<text x="{left - 8}" y="{base - 10}" text-anchor="end" {MONO} fill="{INK}">'
            f"{escape(str(column))}</text>"
            f'<line x1="{left}" x2="{left + bar * len(steps):.0f}" y1="{base}" y2="{base}" '
            f'stroke="{RULE}"/>'
            f'<text x="{left + bar * len(steps) + 6:.0f}" y="{base - 10}" fill="{MUTED}">'
            f"max {_label(peak)}</text>"
        )
        for j, count in enumerate(counts):
            if not count > 0:
                continue
            h = (strip - 4) * count / peak
            out.append(
                f'<rect x="{left + j * bar:.1f}" y="{base - h:.1f}" width="{bar * 0.85:.1f}" '
                f'height="{h:.1f}" fill="{colour}"><title>{escape(str(column))} '
                f"{escape(_step(steps[j]))}: {_label(count)}</title></rect>"
            )
    axis_y = frame.shape[1] * (strip + gap) + 14
    every = max(1, len(steps) // 8)
    for j in range(0, len(steps), every):
        out.append(
            f'<text x="{left + j * bar:.1f}" y="{axis_y}" fill="{MUTED}">'
            f"{escape(_step(steps[j]))}</text>"
        )
    return _svg(width, height, label, out)


def _step(value: object) -> str:
    """An index value as a short label (a date for times)."""
    if isinstance(value, pd.Timestamp | np.datetime64):
        return str(pd.Timestamp(value).date())
    return str(value)


def _scale(values: np.ndarray, include_zero: bool) -> tuple[float, float]:
    low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
    if include_zero:
        low, high = min(low, 0.0), max(high, 0.0)
    if high <= low:
        pad = abs(high) * 0.1 or 1.0
        low, high = low - pad, high + pad
    return low, high


def bars(labels: Sequence[str], values: Sequence[float], *,
         reference: Sequence[float] | None = None, fmt: str = "{:.2f}",
         label: str = "bar chart", value_name: str = "now",
         reference_name: str = "reference",
         marks: Sequence[tuple[str, float]] = ()) -> Markup:
    """Horizontal bars from zero, one per label; a reference value per bar is drawn as a dark
    tick across it (e.g. the training share beside the recent one). Blank values draw no bar.
    ``marks`` are (name, value) levels drawn as dashed lines across every bar (e.g. a watch
    and a retrain limit), named under the chart; the scale always reaches them."""
    values = np.asarray(values, dtype=float)
    refs = None if reference is None else np.asarray(reference, dtype=float)
    if not len(labels):
        return _empty("Nothing to show.")
    left, width_plot, row, top = 190, 420, 22, 24
    levels = [float(value) for _, value in marks]
    low, high = _scale(_finite(np.concatenate([values, refs if refs is not None else [],
                                               levels])), True)
    span = high - low

    def x(v: float) -> float:
        return left + width_plot * (v - low) / span

    out = [_legend(left, 12, [(value_name, ACCENT, "bar")]
                   + ([(reference_name, INK, "tick")] if refs is not None else []))]
    for i, name in enumerate(labels):
        y = top + i * row
        out.append(f'<text x="{left - 8}" y="{y + 14}" text-anchor="end" fill="{INK}">'
                   f"{escape(str(name))}</text>")
        value = values[i]
        if math.isfinite(value):
            a, b = sorted((x(0.0), x(value)))
            out.append(f'<rect x="{a:.1f}" y="{y + 4}" width="{max(b - a, 1):.1f}" height="13" '
                       f'fill="{ACCENT}"><title>{escape(str(name))}: '
                       f"{escape(fmt.format(value))}</title></rect>")
            out.append(f'<text x="{max(a, b) + 4:.1f}" y="{y + 14}" fill="{MUTED}">'
                       f"{escape(fmt.format(value))}</text>")
        if refs is not None and math.isfinite(refs[i]):
            out.append(f'<line x1="{x(refs[i]):.1f}" x2="{x(refs[i]):.1f}" y1="{y + 1}" '
                       f'y2="{y + 20}" stroke="{INK}" stroke-width="2"><title>'
                       f"{escape(reference_name)}: {escape(fmt.format(refs[i]))}</title></line>")
    bottom = top + len(labels) * row
    out.append(f'<line x1="{x(0.0):.1f}" x2="{x(0.0):.1f}" y1="{top}" y2="{bottom}" '
               f'stroke="{RULE}"/>')
    for k, (name, value) in enumerate(marks):
        if not math.isfinite(value):
            continue
        out.append(f'<line x1="{x(value):.1f}" x2="{x(value):.1f}" y1="{top}" y2="{bottom}" '
                   f'stroke="{SECOND}" stroke-dasharray="4 3"><title>{escape(name)}: '
                   f"{escape(fmt.format(value))}</title></line>"
                   f'<text x="{x(value):.1f}" y="{bottom + 14 + 12 * (k % 2)}" '
                   f'text-anchor="middle" fill="{SECOND}">{escape(name)} '
                   f"{escape(fmt.format(value))}</text>")
    return _svg(left + width_plot + 80, bottom + (36 if marks else 8), label, out)


def intervals(labels: Sequence[str], estimates: Sequence[float], lows: Sequence[float],
              highs: Sequence[float], *, reference: Sequence[float] | None = None,
              zero: bool = True, label: str = "estimates with intervals",
              estimate_name: str = "estimate", reference_name: str = "reference",
              fmt: str = "{:.2f}") -> Markup:
    """A forest plot: per row a point with its interval, optionally a second marker (a diamond,
    e.g. the model's own estimate) and a dashed line at zero. Blank rows say "no estimate"."""
    est = np.asarray(estimates, dtype=float)
    lo = np.asarray(lows, dtype=float)
    hi = np.asarray(highs, dtype=float)
    refs = None if reference is None else np.asarray(reference, dtype=float)
    if not len(labels):
        return _empty("Nothing to show.")
    left, width_plot, row, top = 210, 420, 26, 26
    pool = [est, lo, hi] + ([refs] if refs is not None else [])
    low, high = _scale(_finite(np.concatenate(pool)), zero)
    pad = (high - low) * 0.05
    low, high = low - pad, high + pad

    def x(v: float) -> float:
        return left + width_plot * (v - low) / (high - low)

    out = [_legend(left, 12, [(estimate_name, ACCENT, "dot")]
                   + ([(reference_name, SECOND, "diamond")] if refs is not None else []))]
    bottom = top + len(labels) * row
    for tick in ticks(low, high):
        if low <= tick <= high:
            out.append(f'<line x1="{x(tick):.1f}" x2="{x(tick):.1f}" y1="{top}" y2="{bottom}" '
                       f'stroke="#eef1ef"/><text x="{x(tick):.1f}" y="{bottom + 14}" '
                       f'text-anchor="middle" fill="{MUTED}">{_label(tick)}</text>')
    if zero and low <= 0 <= high:
        out.append(f'<line x1="{x(0):.1f}" x2="{x(0):.1f}" y1="{top}" y2="{bottom}" '
                   f'stroke="{MUTED}" stroke-dasharray="4 3"/>')
    for i, name in enumerate(labels):
        y = top + i * row + row / 2
        out.append(f'<text x="{left - 8}" y="{y + 4:.0f}" text-anchor="end" fill="{INK}">'
                   f"{escape(str(name))}</text>")
        if not math.isfinite(est[i]):
            out.append(f'<text x="{left + 4}" y="{y + 4:.0f}" fill="{MUTED}">no estimate</text>')
        else:
            if math.isfinite(lo[i]) and math.isfinite(hi[i]):
                out.append(f'<line x1="{x(lo[i]):.1f}" x2="{x(hi[i]):.1f}" y1="{y:.0f}" '
                           f'y2="{y:.0f}" stroke="{ACCENT}" stroke-width="2"/>')
            out.append(f'<circle cx="{x(est[i]):.1f}" cy="{y:.0f}" r="4.5" fill="{ACCENT}">'
                       f"<title>{escape(str(name))}: {escape(fmt.format(est[i]))} "
                       f"({escape(fmt.format(lo[i]))} to {escape(fmt.format(hi[i]))})"
                       "</title></circle>")
        if refs is not None and math.isfinite(refs[i]):
            cx = x(refs[i])
            out.append(f'<path d="M{cx:.1f},{y - 6:.0f} l6,6 l-6,6 l-6,-6 z" fill="{SECOND}">'
                       f"<title>{escape(reference_name)}: {escape(fmt.format(refs[i]))}"
                       "</title></path>")
    return _svg(left + width_plot + 40, bottom + 24, label, out)


def lines(x_values: Sequence[float] | Sequence[str], series: Mapping[str, Sequence[float]], *,
          diagonal: bool = False, label: str = "line chart", x_name: str = "",
          y_name: str = "") -> Markup:
    """One line per series over shared x values, with points; blank values break a line.

    Numbers on x are placed by value; text is spaced evenly. ``diagonal`` draws y = x (for
    calibration: observed rate against mean predicted probability)."""
    if not len(x_values) or not series:
        return _empty("Nothing to show.")
    numeric = all(isinstance(v, int | float | np.number) for v in x_values)
    xs = np.asarray(x_values, dtype=float) if numeric else np.arange(len(x_values), dtype=float)
    ys = {name: np.asarray(values, dtype=float) for name, values in series.items()}
    left, top, width_plot, height_plot = 60, 30, 480, 240
    x_low, x_high = _scale(_finite(xs), False)
    y_low, y_high = _scale(_finite(np.concatenate(list(ys.values()))), True)
    if diagonal:
        x_low = y_low = min(x_low, y_low, 0.0)
        x_high = y_high = max(x_high, y_high)

    def px(v: float) -> float:
        return left + width_plot * (v - x_low) / (x_high - x_low)

    def py(v: float) -> float:
        return top + height_plot * (1 - (v - y_low) / (y_high - y_low))

    out = [_legend(left, 14, [(name, SERIES[k % len(SERIES)], "line")
                              for k, name in enumerate(ys)])]
    bottom = top + height_plot
    for tick in ticks(y_low, y_high):
        if y_low <= tick <= y_high:
            out.append(f'<line x1="{left}" x2="{left + width_plot}" y1="{py(tick):.1f}" '
                       f'y2="{py(tick):.1f}" stroke="#eef1ef"/><text x="{left - 6}" '
                       f'y="{py(tick) + 4:.1f}" text-anchor="end" fill="{MUTED}">'
                       f"{_label(tick)}</text>")
    if numeric:
        x_ticks = [(t, _label(t)) for t in ticks(x_low, x_high) if x_low <= t <= x_high]
    else:
        every = max(1, len(x_values) // 8)
        x_ticks = [(float(j), str(x_values[j])) for j in range(0, len(x_values), every)]
    for tick, text in x_ticks:
        out.append(f'<text x="{px(tick):.1f}" y="{bottom + 16}" text-anchor="middle" '
                   f'fill="{MUTED}">{escape(text)}</text>')
    out.append(f'<line x1="{left}" x2="{left + width_plot}" y1="{bottom}" y2="{bottom}" '
               f'stroke="{RULE}"/><line x1="{left}" x2="{left}" y1="{top}" y2="{bottom}" '
               f'stroke="{RULE}"/>')
    if diagonal:
        out.append(f'<line x1="{px(x_low):.1f}" y1="{py(x_low):.1f}" x2="{px(x_high):.1f}" '
                   f'y2="{py(x_high):.1f}" stroke="{MUTED}" stroke-dasharray="4 3"/>')
    for k, (name, values) in enumerate(ys.items()):
        colour = SERIES[k % len(SERIES)]
        runs: list[list[str]] = [[]]
        for xv, yv in zip(xs, values, strict=True):
            if math.isfinite(xv) and math.isfinite(yv):
                runs[-1].append(f"{px(xv):.1f},{py(yv):.1f}")
                out.append(f'<circle cx="{px(xv):.1f}" cy="{py(yv):.1f}" r="3" fill="{colour}">'
                           f"<title>{escape(name)}: {_label(float(yv))}</title></circle>")
            elif runs[-1]:
                runs.append([])
        for run in runs:
            if len(run) > 1:
                out.append(f'<polyline points="{" ".join(run)}" fill="none" stroke="{colour}" '
                           f'stroke-width="2"/>')
    if x_name:
        out.append(f'<text x="{left + width_plot / 2:.0f}" y="{bottom + 32}" '
                   f'text-anchor="middle" fill="{INK}">{escape(x_name)}</text>')
    if y_name:
        out.append(f'<text transform="translate(14,{top + height_plot / 2:.0f}) rotate(-90)" '
                   f'text-anchor="middle" fill="{INK}">{escape(y_name)}</text>')
    return _svg(left + width_plot + 20, bottom + 40, label, out)


def _legend(x: float, y: float, entries: list[tuple[str, str, str]]) -> str:
    """A one-line legend: (name, colour, mark) with mark one of bar, tick, dot, diamond, line."""
    out = []
    for name, colour, mark in entries:
        if mark == "bar":
            out.append(f'<rect x="{x}" y="{y - 8}" width="12" height="9" fill="{colour}"/>')
        elif mark == "tick":
            out.append(f'<line x1="{x + 6}" x2="{x + 6}" y1="{y - 10}" y2="{y + 2}" '
                       f'stroke="{colour}" stroke-width="2"/>')
        elif mark == "dot":
            out.append(f'<circle cx="{x + 6}" cy="{y - 4}" r="4" fill="{colour}"/>')
        elif mark == "diamond":
            out.append(f'<path d="M{x + 6},{y - 10} l6,6 l-6,6 l-6,-6 z" fill="{colour}"/>')
        else:
            out.append(f'<line x1="{x}" x2="{x + 14}" y1="{y - 4}" y2="{y - 4}" '
                       f'stroke="{colour}" stroke-width="2"/>')
        out.append(f'<text x="{x + 18}" y="{y}" fill="{INK}">{escape(name)}</text>')
        x += 30 + 7 * len(name)
    return "".join(out)
