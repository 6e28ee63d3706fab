"""Shaping variants: extra reward on top of a task's own reward, chosen by keyword.

* ``none``: the task's own reward, unchanged.
* ``potential``: F = gamma * Phi(s') - Phi(s), with Phi(s') = 0 when the step terminates and
  never at a truncation. Leaves the optimal policy unchanged (Ng, Harada & Russell 1999).
* ``potential_ahead``: the same with Phi taken where the pending commands of a task with a dead
  time carry the plant, predicted noise-free from the observation
  (:meth:`qlab.tasks.base.ControlTask.potential_ahead`): a command's effect is credited when it is
  given, not when it acts. Still potential-based (a function of the observation), so it keeps the
  optimal policy too; without dead time it equals ``potential``. Offered by every task with a
  potential; refused by a Kiln that hides its pending commands.
* ``progress``: F = k * max(0, d(s) - d(s')) for the task's goal distance d: a naive bonus
  for getting closer with no charge for moving away. Not potential-based: it can change the
  optimal policy, which the shaping audit measures.

The arithmetic lives in :func:`shaping_bonus`, shared by the gymnasium wrapper, the batched
stepper and the grid models, so every place shapes the same way.
"""

from __future__ import annotations

from typing import Any

import gymnasium as gym
import numpy as np

from qlab.validation import require_choice, require_gamma

SHAPING_VARIANTS = ("none", "potential", "potential_ahead", "progress")


def check_variant(variant: str, allowed: tuple[str, ...] = SHAPING_VARIANTS) -> str:
    """Return ``variant`` if allowed, else raise ``ValueError`` listing the valid variants."""
    return require_choice("shaping", variant, allowed, note="for this task")


def shaping_bonus(
    variant: str,
    task: Any,
    obs: np.ndarray,
    next_obs: np.ndarray,
    terminated: np.ndarray,
    gamma: float,
    progress_scale: float,
) -> np.ndarray:
    """Shaping reward F for a batch of transitions, shape ``(N,)``.

    ``task`` supplies ``potential(obs)``, ``potential_ahead(obs)`` and ``goal_distance(obs)`` (all batched).
    """
    check_variant(variant)
    n = np.asarray(terminated).shape[0]
    if variant == "none":
        return np.zeros(n)
    if variant in ("potential", "potential_ahead"):
        phi = task.potential if variant == "potential" else task.potential_ahead
        phi_next = np.where(terminated, 0.0, phi(next_obs))
        return gamma * phi_next - phi(obs)
    return progress_scale * np.maximum(0.0, task.goal_distance(obs) - task.goal_distance(next_obs))


class ShapedReward(gym.Wrapper):
    """Adds a shaping variant's bonus to the reward; ``info['base_reward']`` stays the task's own."""

    def __init__(self, env: gym.Env, variant: str, gamma: float, progress_scale: float | None = None):
        super().__init__(env)
        task = env.unwrapped
        check_variant(variant, getattr(task, "shaping_variants", ("none",)))
        self.variant = variant
        self.gamma = require_gamma(gamma)
        self.progress_scale = float(task.default_progress_scale if progress_scale is None else progress_scale)
        self._last_obs: np.ndarray | None = None

    def reset(self, **kwargs):
        obs, info = self.env.reset(**kwargs)
        self._last_obs = obs
        return obs, info

    def step(self, action):
        obs, reward, terminated, truncated, info = self.env.step(action)
        bonus = shaping_bonus(
            self.variant,
            self.env.unwrapped,
            np.asarray(self._last_obs)[None],
            np.asarray(obs)[None],
            np.array([terminated]),
            self.gamma,
            self.progress_scale,
        )[0]
        self._last_obs = obs
        return obs, float(reward + bonus), terminated, truncated, info
