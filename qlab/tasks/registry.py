"""The factory behind the gymnasium ids: build a task and wrap it in its shaping variant.

``gymnasium.make("qlab/Dock-v0", shaping="potential", gamma=0.99, start_distance_m=(20, 30))``
passes ``shaping``, ``gamma`` and ``progress_scale`` to the wrapper and everything else to the
task's constructor.
"""

from __future__ import annotations

import importlib
from typing import Any

import gymnasium as gym

from qlab.shaping import ShapedReward, check_variant


def make_task(target: str, shaping: str = "none", gamma: float = 0.99,
              progress_scale: float | None = None, **params: Any) -> gym.Env:
    """Construct the task class ``target`` (``module:Class``) from ``params`` and apply the shaping variant."""
    module, name = target.split(":")
    task_cls = getattr(importlib.import_module(module), name)
    check_variant(shaping, task_cls.shaping_variants)
    task = task_cls(**params)
    if shaping == "none":
        return task
    return ShapedReward(task, shaping, gamma, progress_scale)
