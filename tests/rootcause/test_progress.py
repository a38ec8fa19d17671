"""Progress a person can follow (causeline.service.progress): steps, rows done, rate, time left.

A fake clock drives the timing, so the expected lines are worked out by hand here.
"""

from __future__ import annotations

import io

from causeline.service.progress import LOG_EVERY, Console


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_a_log_gets_plain_lines_at_most_every_few_seconds() -> None:
    stream, clock = io.StringIO(), Clock()
    progress = Console(stream, clock)
    progress.step("step 3/6: explaining 1,000 events")
    progress.start("explaining", 1_000, "events")
    for done in range(100, 1_001, 100):  # one chunk every 3 s: 30 s in all
        clock.now += 3.0
        progress.advance(done)
    progress.finish()
    lines = stream.getvalue().splitlines()
    assert "\r" not in stream.getvalue()
    assert lines[0] == "step 3/6: explaining 1,000 events"
    # The start line, then one line per LOG_EVERY seconds at most, then the final line.
    counted = [line for line in lines[1:] if line.startswith("  explaining: ")]
    assert len(counted) <= 2 + 30 / LOG_EVERY
    # 400 events after 12 s: 33 events/s; 600 left at that rate take 18 s.
    assert "  explaining: 400/1,000 events, 40 %, 33 rows/s, 12 s so far, about 18 s left" in lines
    assert lines[-1] == "  explaining: 1,000/1,000 events, 100 %, 33 rows/s, 30 s so far"


def test_a_terminal_gets_one_line_rewritten_in_place() -> None:
    stream, clock = Terminal(), Clock()
    progress = Console(stream, clock)
    progress.start("reading and explaining", 4, "partitions")
    clock.now += 10
    progress.advance(1, rows=250_000)
    clock.now += 10
    progress.advance(2, rows=500_000)
    progress.finish()
    progress.step("step 4/6: grouping")
    text = stream.getvalue()
    assert text.count("\n") == 2  # the finished counted line, then the step
    assert text.count("\r\x1b[2K") == 4  # start, two advances, final redraw
    final = text.split("\r\x1b[2K")[-1]
    assert final.startswith("  reading and explaining: 2/4 partitions (500,000 rows), 50 %, "
                            "25,000 rows/s, 20 s so far, about 20 s left\n")
    assert text.endswith("step 4/6: grouping\n")


def test_rootcause_says_how_far_it_is_unless_quiet(demo_bundle, demo_parquet, tmp_path, capsys  # type: ignore[no-untyped-def]
                                                   ) -> None:
    from causeline.cli import main

    args = ["rootcause", "--bundle", str(demo_bundle.path), "--events", str(demo_parquet)]
    assert main([*args, "--out", str(tmp_path / "a")]) == 0
    said = capsys.readouterr().err
    assert "step 3/6: explaining" in said and "  explaining: " in said and "100 %" in said
    assert main([*args, "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert capsys.readouterr().err == ""
