"""Common skeleton of qlab's control tasks: physics written once, batched, in numpy.

Every task subclasses :class:`ControlTask` and writes its dynamics a single time, in
:meth:`ControlTask.batch_step`, for ``N`` copies of the plant at once. The gymnasium
``reset``/``step`` pair of a single environment is the ``N = 1`` case of the same code, and
:class:`qlab.tasks.batch.TaskBatch` steps many copies together.

Actions reach the physics as a physical control array of shape ``(N, control_dim)``: a
discrete action index is mapped to one of ``n_levels`` evenly spaced control levels, a
continuous action is clipped to the control bounds (unless the bounds are switched off).

A task with a dead time keeps the commands given but not yet acting in its state, oldest first
(:meth:`ControlTask._delay`), and shows them as the last columns of its observation, so the task
stays Markov; :meth:`ControlTask.potential_ahead` predicts where they take the plant.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np
from gymnasium import spaces

from qlab.validation import require_choice, require_int

ACTION_KINDS = ("discrete", "continuous")


@dataclass(frozen=True)
class StepOutcome:
    """Result of one batched physics step for ``N`` copies."""

    next_state: np.ndarray  # (N, state_dim) float64
    base_reward: np.ndarray  # (N,) float64, the task's own reward
    terminated: np.ndarray  # (N,) bool, success or failure (or the end of a batch)
    success: np.ndarray  # (N,) bool


class MeanDraws:
    """Stands in for a numpy ``Generator`` in a task's physics: every draw is its mean, so noise is off.

    Provides the draws qlab's tasks may use, each with a ``size`` of ``(N, ...)`` as for
    :class:`qlab.tasks.batch.CopyStreams`: ``uniform``, ``standard_normal`` and ``normal``.
    """

    def uniform(self, low: Any = 0.0, high: Any = 1.0, size: Any = None) -> np.ndarray:
        return np.full(size, 0.5 * (np.asarray(low, dtype=np.float64) + high))

    def standard_normal(self, size: Any = None, dtype: Any = np.float64) -> np.ndarray:
        return np.zeros(size, dtype=dtype)

    def normal(self, loc: Any = 0.0, scale: Any = 1.0, size: Any = None) -> np.ndarray:
        return np.full(size, np.asarray(loc, dtype=np.float64))


class ControlTask(gym.Env):
    """Base class: subclasses define the physics, the observation and the shaping signals.

    Subclasses must set ``self.observation_space``, call :meth:`_setup_actions` and
    :meth:`_setup_time_cap` in ``__init__``, and implement :meth:`sample_start`,
    :meth:`batch_step`, :meth:`observe`, :meth:`potential` and :meth:`goal_distance`.
    """

    metadata: ClassVar[dict[str, Any]] = {"render_modes": []}
    #: Shaping variants that make sense for this task (see :mod:`qlab.shaping`).
    shaping_variants: ClassVar[tuple[str, ...]] = ("none", "potential", "potential_ahead", "progress")
    #: Default weight k of the ``progress`` bonus, per unit of goal distance.
    default_progress_scale: ClassVar[float] = 0.01

    control_levels: np.ndarray | None
    control_low: np.ndarray
    control_high: np.ndarray
    max_steps: int
    #: steps between giving a command and its acting (0: at once); see :meth:`_setup_dead_time`
    dead_time_steps: int = 0

    # --- set-up helpers -------------------------------------------------------------------

    def _setup_actions(
        self,
        control_low: np.ndarray | float,
        control_high: np.ndarray | float,
        action_kind: str,
        n_levels: int,
        clip: bool = True,
    ) -> None:
        """Build the action space: ``n_levels`` evenly spaced levels or a continuous box."""
        require_choice("action_kind", action_kind, ACTION_KINDS)
        self.control_low = np.atleast_1d(np.asarray(control_low, dtype=np.float64))
        self.control_high = np.atleast_1d(np.asarray(control_high, dtype=np.float64))
        self.action_kind = action_kind
        self.clip_controls = clip
        if action_kind == "discrete":
            n_levels = require_int("n_levels", n_levels, 2)
            if not (np.all(np.isfinite(self.control_low)) and np.all(np.isfinite(self.control_high))):
                raise ValueError("discrete actions need finite control bounds")
            frac = np.linspace(0.0, 1.0, n_levels)[:, None]
            self.control_levels = self.control_low + frac * (self.control_high - self.control_low)
            self.action_space = spaces.Discrete(n_levels)
        else:
            self.control_levels = None
            low = self.control_low if clip else np.full_like(self.control_low, -np.inf)
            high = self.control_high if clip else np.full_like(self.control_high, np.inf)
            self.action_space = spaces.Box(low.astype(np.float32), high.astype(np.float32), dtype=np.float32)

    def _setup_dead_time(self, dead_time_steps: int) -> None:
        """Validate the dead time (after :meth:`_setup_actions`): at reset every pending command is 0.

        With discrete actions the zero control must be one of the levels (an odd ``n_levels`` on a
        symmetric range), so the pending commands only ever hold levels.
        """
        self.dead_time_steps = require_int("dead_time_steps", dead_time_steps, 0)
        if self.dead_time_steps and self.control_levels is not None:
            span = np.max(self.control_high - self.control_low)
            if not np.any(np.all(np.abs(self.control_levels) <= 1e-12 * span, axis=1)):
                raise ValueError(
                    f"dead_time_steps={self.dead_time_steps} starts the pending commands at control 0, which must be "
                    f"one of the {len(self.control_levels)} levels: choose an odd n_levels"
                )

    def _setup_time_cap(self, max_steps: int) -> None:
        self.max_steps = require_int("max_steps", max_steps, 1)
        self._state: np.ndarray | None = None
        self._elapsed = 0

    # --- what subclasses write once -------------------------------------------------------

    def sample_start(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Draw ``n`` start states, shape ``(n, state_dim)``."""
        raise NotImplementedError

    def batch_step(self, state: np.ndarray, control: np.ndarray, rng: np.random.Generator) -> StepOutcome:
        """Advance ``N`` copies one step under physical controls of shape ``(N, control_dim)``."""
        raise NotImplementedError

    def observe(self, state: np.ndarray) -> np.ndarray:
        """Observation of each copy, shape ``(N, obs_dim)``, dtype of the observation space."""
        raise NotImplementedError

    def potential(self, obs: np.ndarray) -> np.ndarray:
        """Value-like potential Phi(obs) in [0, 1], highest at the goal, shape ``(N,)``."""
        raise NotImplementedError

    def goal_distance(self, obs: np.ndarray) -> np.ndarray:
        """Non-negative distance to the goal used by the ``progress`` bonus, shape ``(N,)``."""
        raise NotImplementedError

    # --- shared machinery -----------------------------------------------------------------

    @property
    def pending_in_observation(self) -> int:
        """How many pending commands the observation shows as its last columns: all of them."""
        return self.dead_time_steps

    def observation_levels(self) -> list[int]:
        """Distinct values of each observation dimension: ``n_levels`` for a pending command of
        discrete actions, 0 for a continuous dimension. Learners' grids and tiles read it (one cell
        per level, :func:`qlab.features.level_bins`)."""
        dim = int(self.observation_space.shape[0])
        if self.control_levels is None:
            return [0] * dim
        shown = self.pending_in_observation * self.control_low.size
        return [0] * (dim - shown) + [len(self.control_levels)] * shown

    def _delay(self, pending: np.ndarray, command: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The control acting this step and the pending commands after it (a first-in first-out queue).

        ``pending``: ``(N, dead_time_steps * control_dim)``, oldest first; ``command``: ``(N, control_dim)``.
        Without dead time the command acts at once and nothing is pending.
        """
        if not self.dead_time_steps:
            return command, pending
        k = self.control_low.size
        return pending[:, :k], np.concatenate([pending[:, k:], command], axis=1)

    def state_from_observation(self, obs: np.ndarray) -> np.ndarray:
        """The state behind observations that show the pending commands, ``(N, state_dim)`` float64."""
        return np.array(obs, dtype=np.float64)

    def potential_ahead(self, obs: np.ndarray) -> np.ndarray:
        """Phi of the plant after the pending commands have acted, predicted noise-free, shape ``(N,)``.

        The state behind ``obs`` is stepped once per pending command through :meth:`batch_step` with
        every random draw at its mean (:class:`MeanDraws`); the commands given meanwhile act only
        later. A copy the prediction sees end stays where it ended, with Phi = 0 if it failed (the
        potential of a terminal state). With no pending command shown this is :meth:`potential`.
        """
        steps = self.pending_in_observation
        if not steps:
            return self.potential(obs)
        state = self.state_from_observation(obs)
        later = np.zeros((state.shape[0], self.control_low.size))
        ended = np.zeros(state.shape[0], dtype=bool)
        failed = np.zeros(state.shape[0], dtype=bool)
        for _ in range(steps):
            out = self.batch_step(state, later, MeanDraws())
            state = np.where(ended[:, None], state, out.next_state)
            failed |= ~ended & out.terminated & ~out.success
            ended |= out.terminated
        return np.where(failed, 0.0, self.potential(self.observe(state)))

    def controls(self, action: np.ndarray) -> np.ndarray:
        """Map a batch of actions (indices or continuous vectors) to physical controls (N, control_dim)."""
        if self.control_levels is not None:
            return self.control_levels[np.asarray(action, dtype=np.int64).reshape(-1)]
        u = np.asarray(action, dtype=np.float64).reshape(-1, self.control_low.size)
        return np.clip(u, self.control_low, self.control_high) if self.clip_controls else u

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        super().reset(seed=seed)
        self._state = self.sample_start(1, self.np_random)
        self._elapsed = 0
        return self.observe(self._state)[0], {}

    def step(self, action):
        if self._state is None:
            raise RuntimeError("call reset() before step()")
        out = self.batch_step(self._state, self.controls(np.asarray(action)[None]), self.np_random)
        self._state = out.next_state
        self._elapsed += 1
        terminated = bool(out.terminated[0])
        truncated = (not terminated) and self._elapsed >= self.max_steps
        info = {"success": bool(out.success[0]), "base_reward": float(out.base_reward[0])}
        return self.observe(self._state)[0], float(out.base_reward[0]), terminated, truncated, info

    @property
    def state(self) -> np.ndarray:
        """The current internal state of the single environment (a copy), shape ``(state_dim,)``."""
        if self._state is None:
            raise RuntimeError("call reset() first")
        return self._state[0].copy()

    def set_state(self, state: np.ndarray, elapsed: int = 0) -> np.ndarray:
        """Place the single environment in ``state`` (for tests and diagnostics); returns its observation."""
        self._state = np.asarray(state, dtype=np.float64).reshape(1, -1).copy()
        self._elapsed = int(elapsed)
        return self.observe(self._state)[0]
