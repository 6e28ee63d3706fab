"""What a run leaves on disk: metrics table, tensorboard events, summary, finish marker.

Layout of one run folder::

    config.yaml        resolved config (written once, atomically)
    metrics.csv        long table: step, tag, value (rows appended and synced at each checkpoint)
    tb/                tensorboard events (scalars, config text); tb/hparams/ the hparams entry
    checkpoint/        learner and loop state (see qlab.checkpoint)
    summary.json       final numbers and status (finished or diverged)
    FINISHED           marker holding the config hash; a sweep skips runs whose marker matches

Tags are grouped by prefix: ``episode/`` (training episodes), ``eval/`` (greedy evaluation on
the task's own reward), ``learn/`` (learning internals) and ``speed/``.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import tempfile
import time
from pathlib import Path
from typing import Any

MARKER = "FINISHED"
_UMASK = os.umask(0o022)
os.umask(_UMASK)
METRICS = "metrics.csv"
SUMMARY = "summary.json"


def atomic_write_text(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file and a rename (never half-written)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.fchmod(fd, 0o666 & ~_UMASK)  # mkstemp makes owner-only files; give the usual permissions
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def atomic_write_json(path: Path, data: Any) -> None:
    """Atomically write ``data`` as indented JSON."""
    atomic_write_text(path, json.dumps(data, indent=2, sort_keys=True) + "\n")


def file_digest(path: Path) -> str:
    """SHA-256 of a file's bytes (ties a run's metrics table to its summary)."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def read_metrics(run_dir: Path, up_to_step: int | None = None) -> list[tuple[int, str, float]]:
    """Rows (step, tag, value) of a run's metrics table; empty if none yet.

    ``up_to_step``: only the rows up to that step, read for a resume; reading stops at the first
    later row or at a torn last line (a crash while rows were being appended).
    """
    path = Path(run_dir) / METRICS
    if not path.exists():
        return []
    rows = []
    with path.open(newline="") as fh:
        for record in csv.DictReader(fh):
            try:
                row = (int(record["step"]), record["tag"], float(record["value"]))
            except (TypeError, ValueError):
                if up_to_step is None:  # a finished table has no torn line
                    raise
                break
            if up_to_step is not None and row[0] > up_to_step:
                break
            rows.append(row)
    return rows


def _csv_lines(rows: list[tuple[int, str, float]]) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows((s, t, repr(v)) for s, t, v in rows)
    return buf.getvalue()


class Recorder:
    """Collects scalars for one run; mirrors them to tensorboard and to the metrics table.

    Rows live in memory and are appended to ``metrics.csv`` at each :meth:`commit` (called with
    every checkpoint, the file synced), so the table on disk holds at least the rows of the last
    checkpoint and a commit costs only its new rows. Tensorboard events (:mod:`qlab.events`) are
    written at the same moments, each stamped with the wall time its row was recorded at. On
    resume the table is rewritten atomically with the rows up to the checkpoint's step, and
    tensorboard purges events after that step (``purge_step = step + 1``: rows at the
    checkpoint's own step were committed with it).
    """

    def __init__(self, run_dir: Path, resume_step: int = 0, tensorboard: bool = True):
        self.run_dir = Path(run_dir)
        self.rows = read_metrics(self.run_dir, up_to_step=resume_step) if resume_step else []
        atomic_write_text(self.run_dir / METRICS, "step,tag,value\n" + _csv_lines(self.rows))
        self.committed = len(self.rows)
        self.events = None
        if tensorboard:  # imported here: reading results needs neither tensorboard nor torch
            from qlab.events import EventFile

            self.events = EventFile(self.run_dir / "tb", resume_step + 1 if resume_step else None)

    def scalar(self, tag: str, value: float, step: int) -> None:
        """Record one scalar at an environment step."""
        row = (int(step), tag, float(value))
        self.rows.append(row)
        if self.events is not None:
            self.events.scalar(tag, row[2], row[0], time.time())

    def scalars(self, values: dict[str, float], step: int, prefix: str) -> None:
        """Record several scalars under one tag prefix, e.g. ``eval/``."""
        for name, value in values.items():
            self.scalar(f"{prefix}{name}", value, step)

    def text(self, tag: str, body: str) -> None:
        """Attach text (e.g. the resolved config) to the tensorboard run."""
        if self.events is not None:
            from torch.utils.tensorboard.summary import text

            self.events.summary(text(tag, f"```\n{body}\n```"))

    def commit(self) -> None:
        """Append the rows recorded since the last commit to the metrics table, sync it, write tensorboard's events."""
        with (self.run_dir / METRICS).open("a", encoding="utf-8", newline="") as fh:
            fh.write(_csv_lines(self.rows[self.committed:]))
            fh.flush()
            os.fsync(fh.fileno())
        self.committed = len(self.rows)
        self._flush_tensorboard()

    def _flush_tensorboard(self) -> None:
        """Write the queued tensorboard events to their file."""
        if self.events is not None:
            self.events.flush()

    def hparams(self, params: dict[str, Any], final: dict[str, float]) -> None:
        """Link the run's settings to its final metrics in tensorboard's hparams view (the run ``tb/hparams``)."""
        if self.events is not None:
            from torch.utils.tensorboard.summary import hparams

            from qlab.events import EventFile

            clean = {k: v if isinstance(v, int | float | str | bool) else str(v) for k, v in params.items()}
            metrics = {f"final/{k}": v for k, v in final.items()}
            entry = EventFile(self.run_dir / "tb" / "hparams")
            for summary in hparams(clean, metrics):
                entry.summary(summary)
            now = time.time()
            for tag, value in metrics.items():
                entry.scalar(tag, float(value), 0, now)
            entry.close()

    def close(self) -> None:
        """Write the queued events and close the tensorboard file."""
        if self.events is not None:
            self.events.close()
            self.events = None
