"""Progress of a run on the terminal: a redrawn bar, or one line per tenth when piped."""

from __future__ import annotations

import sys
import time


class Progress:
    """Progress of one run: a redrawn bar on a terminal, a line per tenth of the budget when piped;
    in a sweep (``bar=False``) only the closing line, one per run."""

    def __init__(self, label: str, total: int, bar: bool, stream=sys.stderr):
        self.label, self.total, self.bar, self.stream = label, total, bar, stream
        self.live = bar and stream.isatty()
        self.start = time.perf_counter()
        self.shown = -1

    def update(self, step: int, note: str) -> None:
        """Show ``step`` of the budget with a short note (e.g. the latest evaluation)."""
        if not self.bar:
            return
        pct = int(100 * step / self.total)
        if pct == self.shown or (not self.live and pct // 10 == self.shown // 10):
            return
        self.shown = pct
        text = f"[{'#' * (pct // 4):<25}] {pct:3d}%  step {step:,}/{self.total:,}  {note}"
        self.stream.write(f"\r{text:<100}" if self.live else text + "\n")
        self.stream.flush()

    def close(self, message: str) -> None:
        """The run's one closing line: its name, the outcome, the wall time."""
        minutes = (time.perf_counter() - self.start) / 60
        prefix = "\n" if self.live and self.shown >= 0 else ""
        self.stream.write(f"{prefix}{self.label}: {message} ({minutes:.1f} min)\n")
        self.stream.flush()
