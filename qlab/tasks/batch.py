"""Step many copies of one task at once, in numpy, through the task's own ``batch_step``."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qlab.shaping import check_variant, shaping_bonus
from qlab.tasks.base import ControlTask


@dataclass(frozen=True)
class BatchTransition:
    """One step of ``N`` copies: observations before/after, rewards and episode flags."""

    obs: np.ndarray
    action: np.ndarray
    reward: np.ndarray  # training reward (base + shaping bonus)
    base_reward: np.ndarray
    next_obs: np.ndarray
    terminated: np.ndarray
    truncated: np.ndarray
    success: np.ndarray


class TaskBatch:
    """``N`` independent copies of a task, stepped together.

    There is no automatic reset: a copy whose episode ended keeps its final state until
    :meth:`reset` is called for it, so no transition ever crosses an episode boundary.
    """

    def __init__(
        self,
        task: ControlTask,
        n: int,
        seed: int,
        shaping: str = "none",
        gamma: float = 0.99,
        progress_scale: float | None = None,
    ):
        if n < 1:
            raise ValueError(f"n must be >= 1, got {n!r}")
        self.task = task
        self.n = int(n)
        self.rng = np.random.default_rng(seed)
        self.shaping = check_variant(shaping, task.shaping_variants)
        self.gamma = float(gamma)
        self.progress_scale = task.default_progress_scale if progress_scale is None else float(progress_scale)
        self.state = task.sample_start(self.n, self.rng)
        self.elapsed = np.zeros(self.n, dtype=np.int64)
        self.done = np.zeros(self.n, dtype=bool)

    def observe(self) -> np.ndarray:
        """Current observations, shape ``(N, obs_dim)``."""
        return self.task.observe(self.state)

    def reset(self, which: np.ndarray | None = None) -> np.ndarray:
        """Start new episodes for the copies selected by the boolean mask ``which`` (default: all)."""
        which = np.ones(self.n, dtype=bool) if which is None else np.asarray(which, dtype=bool)
        k = int(which.sum())
        if k:
            self.state[which] = self.task.sample_start(k, self.rng)
            self.elapsed[which] = 0
            self.done[which] = False
        return self.observe()

    def step(self, action: np.ndarray) -> BatchTransition:
        """Step every copy; copies already done must be reset first."""
        if self.done.any():
            raise RuntimeError("some copies have ended their episode; reset them before stepping")
        obs = self.observe()
        out = self.task.batch_step(self.state, self.task.controls(action), self.rng)
        self.state = out.next_state
        self.elapsed += 1
        next_obs = self.observe()
        terminated = out.terminated.astype(bool)
        truncated = ~terminated & (self.elapsed >= self.task.max_steps)
        self.done = terminated | truncated
        bonus = shaping_bonus(self.shaping, self.task, obs, next_obs, terminated, self.gamma, self.progress_scale)
        return BatchTransition(
            obs=obs,
            action=np.asarray(action),
            reward=out.base_reward + bonus,
            base_reward=out.base_reward,
            next_obs=next_obs,
            terminated=terminated,
            truncated=truncated,
            success=out.success.astype(bool),
        )
