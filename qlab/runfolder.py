"""A run's folder on disk: who owns it, whether it is finished, and what may happen to it.

Rules (the README's "Interrupting and re-running" states them for users):

* A folder qlab did not create (no ``config.hash``) is refused, never written into.
* Same digest: a finished run is skipped; an unfinished one resumes from its checkpoint.
* Only the budget changed and it is not below the steps already taken: the run resumes from its
  checkpoint and continues to the new budget (a finished run is extended).
* Any other change: the old folder is moved aside to ``<series>/.replaced/<run name>.<old digest>``
  (a message says where) and the run starts afresh. Damaged runs (unreadable summary, cut
  metrics, corrupt checkpoint) are moved aside the same way. Nothing is deleted.
* One process at a time: an OS advisory lock (``<series>/.locks/<run name>.lock``), released by
  the OS when the process dies, so a killed run never blocks its resume.
"""

from __future__ import annotations

import fcntl
import json
import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from qlab.recording import MARKER, SUMMARY
from qlab.runspec import BUDGET_KEY, load_config, run_digest

OWNER = "config.hash"
REPLACED = ".replaced"
LOCKS = ".locks"


class RunFolderError(ValueError):
    """A run folder that may not be written now (not qlab's, locked, or a resume that would not be exact)."""


@dataclass(frozen=True)
class Plan:
    """What to do with a run folder: ``skip`` (finished; ``summary`` holds its result), ``resume`` or ``new``."""

    action: str
    summary: dict[str, Any] | None = None
    note: str = ""


@contextmanager
def locked(run_dir: Path) -> Iterator[None]:
    """Hold the run's advisory lock; :class:`RunFolderError` at once if another process holds it."""
    lock_dir = run_dir.parent / LOCKS
    lock_dir.mkdir(parents=True, exist_ok=True)
    path = lock_dir / f"{run_dir.name}.lock"
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise RunFolderError(f"run folder {run_dir} is being written by another qlab-run process "
                             f"(lock {path}); wait for it to end or stop it") from None
        yield
    finally:
        os.close(fd)  # closing releases the lock


def set_aside(run_dir: Path, tag: str) -> Path:
    """Move ``run_dir`` to ``<series>/.replaced/<name>.<tag>`` (a free name) and return where it went."""
    target_dir = run_dir.parent / REPLACED
    target_dir.mkdir(parents=True, exist_ok=True)
    target, n = target_dir / f"{run_dir.name}.{tag}", 1
    while target.exists():
        n += 1
        target = target_dir / f"{run_dir.name}.{tag}.{n}"
    os.replace(run_dir, target)
    return target


def read_summary(run_dir: Path) -> dict[str, Any]:
    """A run's ``summary.json``; ``ValueError`` naming the file when it is missing or unreadable."""
    path = run_dir / SUMMARY
    try:
        summary = json.loads(path.read_text())
    except (OSError, ValueError) as err:
        raise ValueError(f"{path}: unreadable ({type(err).__name__}: {err})") from None
    if not isinstance(summary, dict) or "final" not in summary or "steps" not in summary:
        raise ValueError(f"{path}: not a qlab run summary")
    return summary


def _stored_tree(run_dir: Path) -> dict[str, Any] | None:
    """The resolved config a run folder was made with, or None if it cannot be read."""
    from omegaconf import OmegaConf

    try:
        return OmegaConf.to_container(load_config(run_dir), resolve=True)  # type: ignore[return-value]
    except ValueError:
        return None


def _budget_only(old: dict[str, Any] | None, stored: str, tree: dict[str, Any], budget: int,
                 steps_done: int | None) -> bool:
    """Whether the folder holds this very run with a smaller budget, and its checkpoint can continue to ``budget``."""
    return (old is not None and run_digest(old) == stored
            and run_digest(old, with_budget=False) == run_digest(tree, with_budget=False)
            and int(old.get(BUDGET_KEY, 0)) < budget and steps_done is not None and steps_done <= budget)


def plan(run_dir: Path, tree: dict[str, Any], budget: int, steps_done: int | None) -> Plan:
    """Decide what happens to ``run_dir`` for a run with resolved config ``tree`` (see the module rules).

    ``steps_done``: steps held by the folder's checkpoint (None without one), for budget extension.
    """
    if not run_dir.exists() or not any(run_dir.iterdir()):
        return Plan("new")
    owner = run_dir / OWNER
    if not owner.is_file():
        raise RunFolderError(f"folder {run_dir} exists and was not made by qlab-run (no {OWNER}); refusing to write "
                         "into it: move it, or choose another series_name")
    digest, stored = run_digest(tree), owner.read_text().strip()
    if stored == digest:
        if not (run_dir / MARKER).exists():
            return Plan("resume")
        try:
            return Plan("skip", summary=read_summary(run_dir))
        except ValueError as err:
            moved = set_aside(run_dir, f"{stored}.damaged")
            return Plan("new", note=f"{err}; the damaged run was moved to {moved} and starts again")
    if _budget_only(_stored_tree(run_dir), stored, tree, budget, steps_done):
        (run_dir / MARKER).unlink(missing_ok=True)
        return Plan("resume", note=f"budget changed: continuing from step {steps_done:,} to {budget:,}")
    moved = set_aside(run_dir, stored or "unknown")
    return Plan("new", note=f"settings changed since this run was made: the old run was moved to {moved}")
