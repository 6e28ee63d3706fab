"""Progress of a run: a tqdm bar on a terminal, one line per tenth of the budget when piped."""

from __future__ import annotations

import sys
import time
from typing import TextIO

from tqdm import tqdm


class Progress:
    """Progress of one run: a tqdm bar on a terminal, a line per tenth of the budget when piped;
    in a sweep (``bar=False``) only the closing line, one per run."""

    def __init__(self, label: str, total: int, bar: bool, stream: TextIO = sys.stderr):
        self.label, self.total, self.bar, self.stream = label, total, bar, stream
        self.start = time.perf_counter()
        self.shown = -1  # percentage of the last line written when piped
        self.live = (tqdm(total=total, desc=label, unit="step", file=stream, leave=True, dynamic_ncols=True)
                     if bar and stream.isatty() else None)

    def update(self, step: int, note: str) -> None:
        """Show ``step`` of the budget with a short note (e.g. the latest evaluation)."""
        if self.live is not None:
            self.live.set_postfix_str(note, refresh=False)
            self.live.update(step - self.live.n)
            return
        pct = int(100 * step / self.total)
        if not self.bar or pct // 10 == self.shown // 10:
            return
        self.shown = pct
        self.stream.write(f"[{'#' * (pct // 4):<25}] {pct:3d}%  step {step:,}/{self.total:,}  {note}\n")
        self.stream.flush()

    def close(self, message: str) -> None:
        """The run's one closing line (after the finished bar on a terminal): its name, the outcome, the wall time."""
        if self.live is not None:
            self.live.close()
        minutes = (time.perf_counter() - self.start) / 60
        self.stream.write(f"{self.label}: {message} ({minutes:.1f} min)\n")
        self.stream.flush()
