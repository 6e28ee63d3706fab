"""qlab's control tasks, registered with gymnasium as ``qlab/<Name>-v0`` when qlab is imported."""

from __future__ import annotations

import gymnasium as gym

from qlab.tasks.base import ControlTask, StepOutcome
from qlab.tasks.batch import BatchTransition, TaskBatch

TASK_IDS = {
    "qlab/Dock-v0": "qlab.tasks.registry:make_dock",
    "qlab/Kiln-v0": "qlab.tasks.registry:make_kiln",
    "qlab/Crane-v0": "qlab.tasks.registry:make_crane",
    "qlab/LinearQuadratic-v0": "qlab.tasks.registry:make_linear_quadratic",
}


def register_tasks() -> None:
    """Register every qlab task with gymnasium (idempotent)."""
    for env_id, entry_point in TASK_IDS.items():
        if env_id not in gym.registry:
            gym.register(id=env_id, entry_point=entry_point)


__all__ = ["TASK_IDS", "BatchTransition", "ControlTask", "StepOutcome", "TaskBatch", "register_tasks"]
