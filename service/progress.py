"""How far a long job is: the step it is in, and counted work with its rate and the time left.

Jobs call a :class:`Progress`; the command line picks where it goes. In a terminal the counted
work is one line rewritten in place; into a file or a pipe (a log) it is a plain line at most
every :data:`LOG_EVERY` seconds and one at the end, so logs stay readable. :class:`Silent` says
nothing (``--quiet``). May import: the standard library only.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO

LOG_EVERY = 10.0  # seconds between plain progress lines in a log
REDRAW_EVERY = 0.2  # seconds between redraws of the line in a terminal


class Progress:
    """Says nothing; subclasses say it somewhere. Calling it with a text announces a step."""

    def __call__(self, text: str) -> None:
        self.step(text)

    def step(self, text: str) -> None:
        """A new step begins (``text`` names it, with its size where known)."""

    def start(self, what: str, total: int, unit: str = "rows") -> None:
        """Counted work begins: ``total`` units of ``what`` (e.g. "explaining", 1_000_000)."""

    def advance(self, done: int, rows: int | None = None) -> None:
        """``done`` units of the counted work are finished (a running total), and with them
        ``rows`` rows when the units are partitions."""

    def finish(self) -> None:
        """The counted work is over."""


class Silent(Progress):
    """For ``--quiet`` and for library callers: nothing at all."""


class Console(Progress):
    """Progress on a stream: an updating line in a terminal, plain lines in a log."""

    def __init__(self, stream: TextIO | None = None, clock=time.monotonic) -> None:  # type: ignore[no-untyped-def]
        self.stream = stream or sys.stderr
        self.clock = clock
        self.live = bool(getattr(self.stream, "isatty", lambda: False)())
        self._what = ""
        self._unit = "rows"
        self._total = 0
        self._done = 0
        self._rows: int | None = None
        self._started = 0.0
        self._shown = -1e9
        self._open = False  # a live line is on screen, not yet ended

    def step(self, text: str) -> None:
        self._end_line()
        self._write(text + "\n")

    def start(self, what: str, total: int, unit: str = "rows") -> None:
        self._end_line()
        self._what, self._unit, self._total = what, unit, max(int(total), 0)
        self._done, self._rows = 0, None
        self._started = self.clock()
        self._shown = -1e9
        self._show(force=self.live)

    def advance(self, done: int, rows: int | None = None) -> None:
        self._done, self._rows = int(done), rows
        self._show(force=False)

    def finish(self) -> None:
        if self._total or self._done:
            self._show(force=True, final=True)
        self._end_line()
        self._total = self._done = 0

    def line(self) -> str:
        """The progress text now: done of total, rate and time left."""
        elapsed = max(self.clock() - self._started, 1e-9)
        share = self._done / self._total if self._total else 0.0
        counted = f"{self._done:,}/{self._total:,} {self._unit}"
        if self._rows is not None:
            counted += f" ({self._rows:,} rows)"
        rate_of = self._rows if self._rows is not None else self._done
        rate = f"{rate_of / elapsed:,.0f} rows/s" if rate_of else "starting"
        left = ""
        if 0 < share < 1:
            left = f", about {_duration(elapsed * (1 - share) / share)} left"
        return (f"  {self._what}: {counted}, {100 * share:.0f} %, {rate}, "
                f"{_duration(elapsed)} so far{left}")

    def _show(self, force: bool, final: bool = False) -> None:
        now = self.clock()
        every = REDRAW_EVERY if self.live else LOG_EVERY
        if not force and now - self._shown < every:
            return
        self._shown = now
        if self.live:
            self._write("\r\x1b[2K" + self.line())
            self._open = True
            if final:
                self._end_line()
        else:
            self._write(self.line() + "\n")

    def _end_line(self) -> None:
        if self._open:
            self._write("\n")
            self._open = False

    def _write(self, text: str) -> None:
        self.stream.write(text)
        self.stream.flush()


def _duration(seconds: float) -> str:
    seconds = round(seconds)
    if seconds < 60:
        return f"{seconds} s"
    minutes, seconds = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"
