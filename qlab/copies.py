"""Many copies of a task behind one interface, for training and evaluating on batches.

:func:`make_copies` picks :class:`~qlab.tasks.batch.TaskBatch` for a qlab task (numpy physics
for all copies at once, per-copy random streams, savable) and :class:`VectorCopies` for any
other gymnasium id (gymnasium's ``SyncVectorEnv`` with automatic reset disabled, not savable).

Both follow :class:`Copies`: no copy runs before :meth:`Copies.reset` starts its episode with a
seed; a copy whose episode ended stays ``done`` until reset again, so a transition never joins
the last observation of one episode to the first of the next; copy ``i`` reset with seed ``s``
repeats the single environment's ``reset(seed=s)`` and its steps.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, Protocol

import gymnasium as gym
import numpy as np
from gymnasium.vector import AutoresetMode, SyncVectorEnv
from gymnasium.wrappers import OrderEnforcing, PassiveEnvChecker

from qlab.tasks.base import ControlTask
from qlab.tasks.batch import BatchTransition, TaskBatch, copy_mask, mask_seeds
from qlab.validation import require_gamma, require_int

#: wrappers ``gymnasium.make`` adds that change nothing a batch of qlab task copies computes
NEUTRAL_WRAPPERS = (OrderEnforcing, PassiveEnvChecker)


class Copies(Protocol):
    """``n`` copies of one task, reset by mask with a seed each and stepped together."""

    n: int
    savable: bool
    done: np.ndarray  # (n,) bool: no running episode (ended, or never started)

    @property
    def observation_space(self) -> gym.Space: ...

    @property
    def action_space(self) -> gym.Space: ...

    def observe(self) -> np.ndarray: ...

    def reset(self, which: np.ndarray | None, seeds: Sequence[int] | np.ndarray) -> np.ndarray: ...

    def step(self, action: np.ndarray, active: np.ndarray | None = None) -> BatchTransition: ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: dict[str, Any]) -> None: ...


class VectorCopies:
    """Copies of any gymnasium environment, on ``gymnasium.vector.SyncVectorEnv`` with autoreset disabled.

    Resets go through the vector env's ``reset(seed=[...], options={"reset_mask": mask})``. A
    step of every copy is the vector env's ``step``; a step of some copies steps those
    sub-environments one by one (``SyncVectorEnv.step`` always steps all of them). Rewards are
    the environment's own: ``base_reward`` equals ``reward``, ``success`` is ``info["success"]``
    where the environment reports it, else False. ``truncated`` is cleared when the same step
    terminated (gymnasium's ``TimeLimit`` may report both), as for qlab tasks.

    Not savable: gymnasium environments expose no state to save, so :meth:`state_dict` and
    :meth:`load_state_dict` raise ``NotImplementedError`` (check :attr:`savable` first).
    """

    savable = False

    def __init__(self, make_env: Callable[[], gym.Env], n: int, shaping: str = "none"):
        if shaping != "none":
            raise ValueError(
                f"shaping {shaping!r} needs a qlab task (potential and goal distance); "
                "other gymnasium environments take shaping 'none'"
            )
        self.n = require_int("n", n, 1)
        self.envs = SyncVectorEnv([make_env] * self.n, autoreset_mode=AutoresetMode.DISABLED)
        self.observation_space = self.envs.single_observation_space
        self.action_space = self.envs.single_action_space
        self.done = np.ones(self.n, dtype=bool)
        self._obs: np.ndarray | None = None

    def observe(self) -> np.ndarray:
        """Current observations of every copy, shape ``(n, obs_dim)``."""
        if self._obs is None:
            raise RuntimeError("call reset() before observe() or step()")
        return self._obs.copy()

    def reset(self, which: np.ndarray | None, seeds: Sequence[int] | np.ndarray) -> np.ndarray:
        """Start new episodes for the copies in ``which`` (``None``: all), copy ``i`` by ``reset(seed=s)``."""
        mask = copy_mask(self.n, which)
        per_copy: list[int | None] = [None] * self.n
        for i, seed in zip(np.flatnonzero(mask), mask_seeds(mask, seeds), strict=True):
            per_copy[i] = seed
        if mask.any():  # SyncVectorEnv refuses an all-False reset mask
            obs, _ = self.envs.reset(seed=per_copy, options={"reset_mask": mask})
            if self._obs is None:
                self._obs = np.zeros_like(obs)
            self._obs[mask] = obs[mask]
            self.done[mask] = False
        return self.observe()

    def step(self, action: np.ndarray, active: np.ndarray | None = None) -> BatchTransition:
        """Step the copies in ``active`` (``None``: all), one action row per active copy; their transitions."""
        mask = copy_mask(self.n, active)
        rows = np.flatnonzero(mask)
        if rows.size == 0:
            raise ValueError("step needs at least one active copy")
        if self.done[rows].any():
            raise RuntimeError("some active copies have no running episode; reset them before stepping")
        action = np.asarray(action)
        if action.shape[:1] != (rows.size,):
            raise ValueError(f"step needs one action per active copy ({rows.size}), got shape {action.shape}")
        obs = self._obs[rows]
        if rows.size == self.n:
            next_obs, reward, terminated, truncated, info = self.envs.step(action)
            success = info["success"] & info["_success"] if "success" in info else np.zeros(self.n, dtype=bool)
        else:
            results = [self.envs.envs[i].step(a) for i, a in zip(rows, action, strict=True)]
            next_obs = np.stack([r[0] for r in results])
            reward, terminated, truncated = (np.array([r[k] for r in results]) for k in (1, 2, 3))
            success = np.array([r[4].get("success", False) for r in results])
        reward = reward.astype(np.float64)
        terminated = terminated.astype(bool)
        truncated = truncated.astype(bool) & ~terminated
        self._obs[rows] = next_obs
        self.done[rows] = terminated | truncated
        return BatchTransition(
            obs=obs,
            action=action,
            reward=reward,
            base_reward=reward.copy(),
            next_obs=np.asarray(next_obs).copy(),
            terminated=terminated,
            truncated=truncated,
            success=success.astype(bool),
        )

    def state_dict(self) -> dict[str, Any]:
        """Not available: see the class docstring."""
        raise NotImplementedError(
            "copies of a gymnasium environment that is not a qlab task cannot be saved (savable is False)"
        )

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Not available: see the class docstring."""
        raise NotImplementedError(
            "copies of a gymnasium environment that is not a qlab task cannot be restored (savable is False)"
        )


def make_copies(
    make_task: Callable[[], gym.Env],
    n: int,
    shaping: str = "none",
    gamma: float = 0.99,
    progress_scale: float | None = None,
) -> Copies:
    """``n`` copies of the task ``make_task()`` builds: a :class:`TaskBatch` if it is a qlab task, else
    :class:`VectorCopies` (shaping ``none`` only).

    A qlab task must come bare from ``make_task`` (``gymnasium.make`` without shaping or other
    wrappers): the batch steps its physics directly and shapes the reward itself, so a wrapper
    would be skipped; any wrapper other than gymnasium's ``OrderEnforcing`` and
    ``PassiveEnvChecker`` raises ``ValueError``.
    """
    require_gamma(gamma)
    probe = make_task()
    if not isinstance(probe.unwrapped, ControlTask):
        probe.close()
        return VectorCopies(make_task, n, shaping)
    env = probe
    while isinstance(env, gym.Wrapper):
        if not isinstance(env, NEUTRAL_WRAPPERS):
            raise ValueError(
                f"make_copies steps the qlab task's physics directly, so the wrapper {type(env).__name__} would be "
                "skipped: build the task bare and pass shaping to make_copies"
            )
        env = env.env
    return TaskBatch(probe.unwrapped, n, shaping, gamma, progress_scale)
