"""qlab's control tasks, registered with gymnasium as ``qlab/<Name>-v0`` when qlab is imported.

:data:`TASKS` is the one table of tasks: gymnasium registration, the ``task`` config group's
options and their schemas (:mod:`qlab.config`) are all derived from it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import gymnasium as gym

from qlab.tasks.base import ControlTask, StepOutcome
from qlab.tasks.batch import BatchTransition, TaskBatch


@dataclass
class LearnerSizes:
    """Learner sizes that fit a task: a table or feature map of these sizes stays small in memory.

    The learner configs read them (``bins: ${qlab_level_bins:${task},${task.learner_sizes.table_bins}}``),
    so every task states defaults that fit it and a command line can still override them. One value
    is for every continuous dimension; dimensions held at discrete levels (pending commands) get one
    cell per level (:func:`qlab.features.level_bins`).
    """

    table_bins: list[int] = field(default_factory=lambda: [40])  # grid cells per continuous dimension (tabular)
    feature_bins: list[int] = field(default_factory=lambda: [8])  # tiles or RBF centres per continuous dimension
    n_tilings: int = 8  # tilings of the tile coder


@dataclass(frozen=True)
class TaskEntry:
    """One task: its config-group option, gymnasium id, class (``module:Class``) and fitting learner sizes."""

    option: str
    env_id: str
    target: str
    sizes: LearnerSizes = field(default_factory=LearnerSizes)


TASKS: dict[str, TaskEntry] = {
    entry.option: entry
    for entry in (
        TaskEntry("dock", "qlab/Dock-v0", "qlab.tasks.dock:Dock"),
        # 4 + dead_time_steps observation dimensions: 6 cells on the 4 continuous ones and one per burner level (5) on
        # each pending command keep the default table (6^4 * 5^4) under 1e6 cells
        TaskEntry("kiln", "qlab/Kiln-v0", "qlab.tasks.kiln:Kiln", LearnerSizes([6], [4], 4)),
        TaskEntry("crane", "qlab/Crane-v0", "qlab.tasks.crane:Crane", LearnerSizes([20], [8], 8)),
        TaskEntry("linear_quadratic", "qlab/LinearQuadratic-v0", "qlab.tasks.linear_quadratic:LinearQuadratic"),
    )
}

#: gymnasium id -> ``module:Class`` of every qlab task
TASK_IDS = {entry.env_id: entry.target for entry in TASKS.values()}


def register_tasks() -> None:
    """Register every qlab task with gymnasium (idempotent)."""
    for entry in TASKS.values():
        if entry.env_id not in gym.registry:
            gym.register(id=entry.env_id, entry_point="qlab.tasks.registry:make_task",
                         kwargs={"target": entry.target})


__all__ = [
    "TASKS", "TASK_IDS", "BatchTransition", "ControlTask", "LearnerSizes", "StepOutcome", "TaskBatch", "TaskEntry",
    "register_tasks",
]
