"""The progress display: one line per tenth of the budget when piped, a tqdm bar on a terminal, only the
closing line in a sweep."""

from __future__ import annotations

import io
import re

from qlab.progress import Progress

BUDGET = 1_000
CLOSING = re.compile(r"^run-a: finished \(\d+\.\d min\)$")


class Terminal(io.StringIO):
    """A stream that says it is a terminal, so the display draws its bar (as on an interactive shell)."""

    def isatty(self) -> bool:
        return True


def feed(progress: Progress, every: int = 10) -> None:
    for step in range(0, BUDGET + 1, every):
        progress.update(step, f"episode {step // every}")
    progress.close("finished")


def test_piped_output_is_one_line_per_tenth_then_the_closing_line():
    stream = io.StringIO()
    feed(Progress("run-a", BUDGET, True, stream), every=10)
    lines = stream.getvalue().splitlines()
    assert "\r" not in stream.getvalue()
    # every tenth of the budget once, at its first update: steps 0, 100, ..., 1,000 of updates every 10 steps
    assert [line.split("]", 1)[1].split("  episode")[0] for line in lines[:-1]] == [
        f" {10 * k:3d}%  step {100 * k:,}/1,000" for k in range(11)]
    assert lines[5] == "[############             ]  50%  step 500/1,000  episode 50"
    assert CLOSING.match(lines[-1])


def test_piped_output_with_coarse_updates_shows_each_tenth_it_reaches():
    stream = io.StringIO()
    progress = Progress("run-a", BUDGET, True, stream)
    for step in (0, 50, 130, 160, 390, 1_000):  # tenths 0, 0, 1, 1, 3, 10
        progress.update(step, "note")
    progress.close("finished")
    lines = stream.getvalue().splitlines()
    assert [re.search(r"step ([\d,]+)/", line)[1] for line in lines[:-1]] == ["0", "130", "390", "1,000"]
    assert CLOSING.match(lines[-1])


def test_a_sweep_shows_only_the_closing_line_even_on_a_terminal():
    for stream in (io.StringIO(), Terminal()):
        feed(Progress("run-a", BUDGET, False, stream))
        assert CLOSING.match(stream.getvalue()) and stream.getvalue().count("\n") == 1


def test_a_terminal_gets_a_tqdm_bar_that_ends_full_before_the_closing_line():
    stream = Terminal()
    feed(Progress("run-a", BUDGET, True, stream), every=50)
    *bar, closing, end = stream.getvalue().split("\n")
    assert end == "" and CLOSING.match(closing)
    # tqdm redraws its line with carriage returns; the last drawing is the finished bar with the last note
    last = "\n".join(bar).split("\r")[-1]
    assert re.match(r"^run-a: 100%\|[^|]+\| 1000/1000 \[.*, episode 20\]$", last)
