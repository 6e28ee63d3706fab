"""Dock: bring a vessel to rest inside a berth at the end of a channel (sparse, delayed feedback)."""

from __future__ import annotations

from typing import Any

import numpy as np
from gymnasium import spaces

from qlab.tasks.base import ControlTask, StepOutcome
from qlab.validation import require_int, require_non_negative, require_positive, require_range

#: The velocity bounds of the observation are this multiple of the terminal speed under full thrust.
VELOCITY_LIMIT_FACTOR = 1.25


class Dock(ControlTask):
    """A vessel moves along a straight channel and must come to rest inside a berth.

    ## Coordinates
    One axis along the channel, in metres. The berth is centred at ``x = 0`` and spans
    ``[-berth_half_length_m, +berth_half_length_m]``. The vessel starts behind the berth (negative
    ``x``) and approaches in ``+x``. The quay wall stands ``quay_margin_m`` past the berth's far
    edge, at ``x_quay = berth_half_length_m + quay_margin_m``. The channel ends behind the start:
    with ``channel_length_m = None`` (default) ``channel_margin_m`` behind the farthest start,
    ``x_end = -(start_distance_m[1] + channel_margin_m)``; with a length in m at
    ``x_end = -channel_length_m`` whatever the start range (which must then lie within it;
    ``channel_margin_m`` is unused), so tasks with different start ranges share one observation box.

    ## Dynamics
    ``mass_kg * dv/dt = u - c1 * v - c2 * v * |v|`` and ``dx/dt = v`` with thrust ``u`` in N,
    ``c1 = linear_drag_N_s_per_m`` and ``c2 = quadratic_drag_N_s2_per_m2``. Each step of ``dt_s``
    holds the thrust and integrates ``substeps`` sub-steps of semi-implicit (symplectic) Euler:
    ``v <- v + h * a(v)``, then ``x <- x + h * v`` with ``h = dt_s / substeps``. With
    ``velocity_noise_m_s > 0`` a Gaussian velocity kick of that standard deviation is added at the
    start of every step (process noise).

    ## Dead time
    The thrust commanded at step ``k`` acts during step ``k + dead_time_steps``:
    ``u_applied[k] = u[k - dead_time_steps]`` (a pure delay). The commands given but not yet acting
    wait in the state, oldest first; at reset they are all zero thrust. With ``dead_time_steps = 0``
    (default) the thrust acts at once.

    ## Observation
    ``Box(2 + dead_time_steps,)`` float32: ``[position_m, velocity_m_s, pending thrusts in N (oldest
    first)...]``, a Markov observation. Bounds: position in ``[x_end, x_quay]``; velocity within
    ``+-1.25 * v_terminal``, where ``v_terminal`` solves ``c1 v + c2 v^2 = max_thrust_N``; pending
    thrusts within ``+-max_thrust_N``. The noise-free physics never leaves these bounds (the sub-step
    is required short enough that the velocity update is monotone, so full thrust cannot overshoot
    the terminal speed); a noise kick beyond them is clipped to them.

    ## Action
    ``action_kind="discrete"``: ``Discrete(n_levels)``, thrust levels evenly spaced on
    ``[-max_thrust_N, +max_thrust_N]`` (index ``n_levels // 2`` is zero thrust for odd ``n_levels``).
    ``action_kind="continuous"``: ``Box(1,)`` thrust in N, clipped to ``+-max_thrust_N``.
    With a dead time and discrete actions ``n_levels`` must be odd, so zero thrust is a level.

    ## Reward
    1 on success, else 0 (the task's own sparse reward).

    ## Start state
    At rest, ``start_distance_m`` behind the berth centre, drawn uniformly from the
    ``(low, high)`` range in metres, no thrust pending. The start distance sets how delayed the
    feedback is.

    ## Episode end
    * success (terminated, reward 1): at the end of a step the vessel is inside the berth and
      ``|v| < contact_speed_m_s``;
    * failure (terminated, reward 0): in any sub-step the vessel reaches the quay faster than
      ``contact_speed_m_s`` (state clamped to the quay, the striking speed kept), or it leaves the
      channel behind ``x_end`` (state clamped to ``x_end``);
    * reaching the quay at ``contact_speed_m_s`` or slower is no failure: the vessel stops against
      it (position clamped to the quay, velocity set to 0) and the step goes on;
    * truncated after ``max_steps`` steps.

    ## Shaping signals
    ``goal_distance`` is the distance from the vessel to the nearest point of the berth in m (0
    inside). ``potential = exp(-goal_distance / potential_length_m)`` lies in (0, 1] and is 1 in the
    berth: a value-like estimate of V* for the sparse task (the design notes' calibrated choice,
    30 m). ``default_progress_scale = 0.01`` per metre: closing the default 100 m approach earns 1
    in total, the same as the success reward. Both read the vessel's position only; the
    ``potential_ahead`` variant takes Phi where the pending thrusts carry the vessel
    (:meth:`~qlab.tasks.base.ControlTask.potential_ahead`).

    ## Parameters (units in the names)
    mass_kg=2000, max_thrust_N=800, linear_drag_N_s_per_m=80, quadratic_drag_N_s2_per_m2=60,
    berth_half_length_m=1, contact_speed_m_s=0.25, quay_margin_m=1.5, start_distance_m=(80, 120),
    channel_margin_m=30, channel_length_m=None, dt_s=1, substeps=4, max_steps=400, n_levels=5,
    action_kind="discrete", velocity_noise_m_s=0, potential_length_m=30, dead_time_steps=0.
    """

    default_progress_scale = 0.01

    def __init__(
        self,
        mass_kg: float = 2000.0,
        max_thrust_N: float = 800.0,
        linear_drag_N_s_per_m: float = 80.0,
        quadratic_drag_N_s2_per_m2: float = 60.0,
        berth_half_length_m: float = 1.0,
        contact_speed_m_s: float = 0.25,
        quay_margin_m: float = 1.5,
        start_distance_m: tuple[float, float] = (80.0, 120.0),
        channel_margin_m: float = 30.0,
        channel_length_m: float | None = None,
        dt_s: float = 1.0,
        substeps: int = 4,
        max_steps: int = 400,
        n_levels: int = 5,
        action_kind: str = "discrete",
        velocity_noise_m_s: float = 0.0,
        potential_length_m: float = 30.0,
        dead_time_steps: int = 0,
    ):
        self.mass_kg = require_positive("mass_kg", mass_kg)
        self.max_thrust_N = require_positive("max_thrust_N", max_thrust_N)
        self.linear_drag_N_s_per_m = require_non_negative("linear_drag_N_s_per_m", linear_drag_N_s_per_m)
        self.quadratic_drag_N_s2_per_m2 = require_non_negative(
            "quadratic_drag_N_s2_per_m2", quadratic_drag_N_s2_per_m2
        )
        if self.linear_drag_N_s_per_m + self.quadratic_drag_N_s2_per_m2 <= 0:
            raise ValueError(
                "linear_drag_N_s_per_m and quadratic_drag_N_s2_per_m2 must not both be 0 (no terminal speed)"
            )
        self.berth_half_length_m = require_positive("berth_half_length_m", berth_half_length_m)
        self.contact_speed_m_s = require_positive("contact_speed_m_s", contact_speed_m_s)
        self.quay_margin_m = require_non_negative("quay_margin_m", quay_margin_m)
        self.start_distance_m = require_range("start_distance_m", start_distance_m, low=self.berth_half_length_m)
        self.channel_margin_m = require_positive("channel_margin_m", channel_margin_m)
        self.channel_length_m = None if channel_length_m is None else require_positive(
            "channel_length_m", channel_length_m)
        if self.channel_length_m is not None and self.start_distance_m[1] > self.channel_length_m:
            raise ValueError(
                f"start_distance_m={list(self.start_distance_m)} must lie within channel_length_m="
                f"{self.channel_length_m} (the channel ends {self.channel_length_m} m behind the berth centre)"
            )
        self.dt_s = require_positive("dt_s", dt_s)
        self.substeps = require_int("substeps", substeps, 1)
        self.velocity_noise_m_s = require_non_negative("velocity_noise_m_s", velocity_noise_m_s)
        self.potential_length_m = require_positive("potential_length_m", potential_length_m)

        self.quay_position_m = self.berth_half_length_m + self.quay_margin_m
        if self.channel_length_m is None:
            self.channel_end_m = -(self.start_distance_m[1] + self.channel_margin_m)
        else:
            self.channel_end_m = -self.channel_length_m
        self.terminal_speed_m_s = self._speed_at_thrust(self.max_thrust_N)
        self.velocity_limit_m_s = VELOCITY_LIMIT_FACTOR * self.terminal_speed_m_s
        self._check_substep_length()

        self._setup_actions(-self.max_thrust_N, self.max_thrust_N, action_kind, n_levels)
        self._setup_dead_time(dead_time_steps)
        self._setup_time_cap(max_steps)
        self._params: dict[str, Any] = {
            "mass_kg": self.mass_kg,
            "max_thrust_N": self.max_thrust_N,
            "linear_drag_N_s_per_m": self.linear_drag_N_s_per_m,
            "quadratic_drag_N_s2_per_m2": self.quadratic_drag_N_s2_per_m2,
            "berth_half_length_m": self.berth_half_length_m,
            "contact_speed_m_s": self.contact_speed_m_s,
            "quay_margin_m": self.quay_margin_m,
            "start_distance_m": list(self.start_distance_m),
            "channel_margin_m": self.channel_margin_m,
            "channel_length_m": self.channel_length_m,
            "dt_s": self.dt_s,
            "substeps": self.substeps,
            "max_steps": self.max_steps,
            "n_levels": int(n_levels),
            "action_kind": action_kind,
            "velocity_noise_m_s": self.velocity_noise_m_s,
            "potential_length_m": self.potential_length_m,
            "dead_time_steps": self.dead_time_steps,
        }
        pending = np.ones(self.dead_time_steps)
        self.state_low = np.concatenate([[self.channel_end_m, -self.velocity_limit_m_s], -self.max_thrust_N * pending])
        self.state_high = np.concatenate([[self.quay_position_m, self.velocity_limit_m_s], self.max_thrust_N * pending])
        self.observation_space = spaces.Box(
            self.state_low.astype(np.float32), self.state_high.astype(np.float32), dtype=np.float32
        )

    @property
    def params(self) -> dict[str, Any]:
        """The constructor arguments after validation (JSON-able), e.g. for cache keys."""
        return dict(self._params)

    def _speed_at_thrust(self, thrust_N: float) -> float:
        """Steady speed in m/s where drag balances ``thrust_N``: root of c1 v + c2 v^2 = thrust."""
        c1, c2 = self.linear_drag_N_s_per_m, self.quadratic_drag_N_s2_per_m2
        return 2.0 * thrust_N / (c1 + np.sqrt(c1 * c1 + 4.0 * c2 * thrust_N))

    def _check_substep_length(self) -> None:
        """Require a monotone velocity update (d v_new / d v > 0) on the velocity bounds."""
        stiffness_per_s = (
            self.linear_drag_N_s_per_m + 2.0 * self.quadratic_drag_N_s2_per_m2 * self.velocity_limit_m_s
        ) / self.mass_kg
        min_substeps = int(np.floor(self.dt_s * stiffness_per_s)) + 1
        if self.substeps < min_substeps:
            raise ValueError(
                f"substeps must be >= {min_substeps} for dt_s={self.dt_s} with this mass and drag "
                f"(sub-step too long for a stable drag update), got {self.substeps}"
            )

    # --- physics --------------------------------------------------------------------------

    def sample_start(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` start states at rest, ``start_distance_m`` behind the berth centre, no thrust pending;
        shape ``(n, 2 + dead_time_steps)``."""
        lo, hi = self.start_distance_m
        state = np.zeros((n, 2 + self.dead_time_steps))
        state[:, 0] = -rng.uniform(lo, hi, size=n)
        return state

    def batch_step(self, state: np.ndarray, control: np.ndarray, rng: np.random.Generator) -> StepOutcome:
        """Advance ``N`` vessels one step of ``dt_s``; the thrust ``control[:, 0]`` in N acts after the dead time."""
        state = np.asarray(state, dtype=np.float64)
        x = state[:, 0].copy()
        v = state[:, 1].copy()
        applied, pending = self._delay(state[:, 2:], np.asarray(control, dtype=np.float64).reshape(-1, 1))
        thrust_N = applied[:, 0]
        if self.velocity_noise_m_s > 0:
            v += self.velocity_noise_m_s * rng.standard_normal(v.shape[0])
            np.clip(v, -self.velocity_limit_m_s, self.velocity_limit_m_s, out=v)
        h = self.dt_s / self.substeps
        h_per_kg = h / self.mass_kg
        c1, c2 = self.linear_drag_N_s_per_m, self.quadratic_drag_N_s2_per_m2
        failed = np.zeros(x.shape[0], dtype=bool)
        any_failed = False
        for _ in range(self.substeps):  # explicit Euler sub-steps: m dv/dt = thrust - (c1 + c2 |v|) v, dx/dt = v
            v_new = v + h_per_kg * (thrust_N - (c1 + c2 * np.abs(v)) * v)
            x_new = x + h * v_new
            if not (any_failed or x_new.max() > self.quay_position_m or x_new.min() < self.channel_end_m):
                x, v = x_new, v_new  # open water: nothing stops a vessel
                continue
            at_quay = x_new > self.quay_position_m
            left_channel = x_new < self.channel_end_m
            strike = at_quay & (v_new > self.contact_speed_m_s)
            x_new[at_quay] = self.quay_position_m
            v_new[at_quay & ~strike] = 0.0
            x_new[left_channel] = self.channel_end_m
            x = np.where(failed, x, x_new)  # a failed vessel stays where it failed
            v = np.where(failed, v, v_new)
            failed |= strike | left_channel
            any_failed = bool(failed.any())
        success = ~failed & (np.abs(x) <= self.berth_half_length_m) & (np.abs(v) < self.contact_speed_m_s)
        next_state = np.empty((x.shape[0], 2 + self.dead_time_steps))
        next_state[:, 0], next_state[:, 1], next_state[:, 2:] = x, v, pending
        return StepOutcome(
            next_state=next_state,
            base_reward=success.astype(np.float64),
            terminated=success | failed,
            success=success,
        )

    def observe(self, state: np.ndarray) -> np.ndarray:
        """``[position_m, velocity_m_s, pending thrusts...]`` as float32, clipped to the observation bounds."""
        clipped = np.minimum(np.maximum(np.asarray(state, dtype=np.float64), self.state_low), self.state_high)
        # Rounding to float32 is monotone, so clipped values stay inside the float32 bounds.
        return clipped.astype(np.float32)

    def goal_distance(self, obs: np.ndarray) -> np.ndarray:
        """Distance in m from the vessel to the nearest point of the berth (0 inside it)."""
        position_m = np.asarray(obs, dtype=np.float64)[:, 0]
        return np.maximum(0.0, np.abs(position_m) - self.berth_half_length_m)

    def potential(self, obs: np.ndarray) -> np.ndarray:
        """Phi = exp(-goal_distance / potential_length_m), in (0, 1], 1 inside the berth."""
        return np.exp(-self.goal_distance(obs) / self.potential_length_m)

