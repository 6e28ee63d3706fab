"""Factories behind the gymnasium ids: build a task and wrap it in its shaping variant.

``gymnasium.make("qlab/Dock-v0", shaping="potential", gamma=0.99, start_distance_m=(20, 30))``
passes ``shaping``, ``gamma`` and ``progress_scale`` to the wrapper and everything else to the
task's constructor.
"""

from __future__ import annotations

from typing import Any

import gymnasium as gym

from qlab.shaping import ShapedReward, check_variant
from qlab.tasks.base import ControlTask


def build(task_cls: type[ControlTask], shaping: str = "none", gamma: float = 0.99,
          progress_scale: float | None = None, **params: Any) -> gym.Env:
    """Construct ``task_cls(**params)`` and apply the shaping variant (``none``: the bare task)."""
    check_variant(shaping, task_cls.shaping_variants)
    task = task_cls(**params)
    if shaping == "none":
        return task
    return ShapedReward(task, shaping, gamma, progress_scale)


def make_dock(**kwargs: Any) -> gym.Env:
    from qlab.tasks.dock import Dock

    return build(Dock, **kwargs)


def make_kiln(**kwargs: Any) -> gym.Env:
    from qlab.tasks.kiln import Kiln

    return build(Kiln, **kwargs)


def make_crane(**kwargs: Any) -> gym.Env:
    from qlab.tasks.crane import Crane

    return build(Crane, **kwargs)


def make_linear_quadratic(**kwargs: Any) -> gym.Env:
    from qlab.tasks.linear_quadratic import LinearQuadratic

    return build(LinearQuadratic, **kwargs)
