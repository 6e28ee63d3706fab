"""Crane: a gantry trolley carries a hanging load to a target and sets it down with little sway."""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from gymnasium import spaces

from qlab.tasks.base import ControlTask, StepOutcome
from qlab.validation import require_int, require_non_negative, require_positive, require_range


class Crane(ControlTask):
    """Gantry crane: move the trolley to the target and stop there with the load hanging still.

    A trolley of mass ``M`` (``mass_trolley_kg``) runs on a straight rail from 0 to
    ``rail_length_m``. A load of mass ``m`` (``mass_load_kg``) hangs below it on a rigid, massless
    rope of length ``L`` (``rope_length_m``). A horizontal force ``F`` drives the trolley, resisted
    by optional viscous friction ``b`` (``friction_N_s_m``). The sway angle ``theta`` is measured
    from the downward vertical, positive when the load lies ahead of the trolley (towards +x).

    **Equations of motion** (Lagrangian of a pendulum on a cart, generalised coordinates x, theta)::

        T = 1/2 (M + m) x'^2 + m L x' theta' cos(theta) + 1/2 m L^2 theta'^2
        V = -m g L cos(theta)
        (M + m) x'' + m L (theta'' cos(theta) - theta'^2 sin(theta)) = F - b x'
        x'' cos(theta) + L theta'' + g sin(theta) = 0

    solved for the accelerations::

        x''     = (F - b x' + m sin(theta) (L theta'^2 + g cos(theta))) / (M + m sin(theta)^2)
        theta'' = -(x'' cos(theta) + g sin(theta)) / L

    Each control step of ``dt_s`` seconds holds the force constant and integrates with
    ``substeps`` classical Runge-Kutta (RK4) sub-steps. With ``lock_trolley=True`` the trolley is
    held still (x'' = 0, x' = 0, the force has no effect) and the load is a simple pendulum.

    **Dead time**: the force commanded at step ``k`` acts during step ``k + dead_time_steps``
    (a pure delay; the process noise is added when it acts). The commands given but not yet acting
    wait in the state, oldest first; at reset they are all zero force. ``dead_time_steps = 0``
    (default): the force acts at once.

    **State** (float64): trolley position x (m), trolley velocity x' (m/s), sway angle theta (rad,
    kept wrapped to [-pi, pi)), sway rate theta' (rad/s), then the ``dead_time_steps`` pending
    forces (N, oldest first).

    **Observation** ``Box(4 + dead_time_steps,)`` float32: the state (Markov), with x clipped to the
    rail ``[0, rail_length_m]``, the two rates clipped to ``+-speed_bound_m_s`` and
    ``+-sway_rate_bound_rad_s`` and the pending forces within ``+-max_force_N``. The bounds
    come from an energy budget ``E_b = max_force_N * rail_length_m + 2 m g L`` (J): the work of the
    full force over the whole rail plus the largest swing energy. Kinetic energy ``E`` allows at
    most ``|x'| <= sqrt(2 E / M)`` and ``|theta'| <= sqrt(2 E (M + m) / (m M L^2))`` (from the
    inverse mass matrix), so a single pass along the rail stays inside; states beyond the bounds
    (only reachable by pumping energy in with repeated reversals) are seen at the bound.

    **Action**: ``action_kind="discrete"``: ``n_levels`` evenly spaced forces from
    ``-max_force_N`` to ``+max_force_N`` (5 levels: -2, -1, 0, 1, 2 kN by default).
    ``"continuous"``: a force in N, clipped to ``+-max_force_N``. Optional process noise adds a
    Gaussian force with standard deviation ``force_noise_N``, drawn per copy and held for the step.
    With a dead time and discrete actions ``n_levels`` must be odd, so zero force is a level.

    **Reward**: 1 on the step that ends in success, else 0.

    **Start state**: trolley at rest at a position drawn uniformly from ``start_position_m``; sway
    angle uniform in ``start_sway_rad``; sway rate drawn uniformly from ``start_sway_rate_rad_s``;
    no force pending.

    **Episode end**: *success* (terminated, reward 1) when, at the end of a control step,
    ``|x - target_m| <= position_tol_m``, ``|x'| <= speed_tol_m_s``, ``|theta| <= sway_tol_rad`` and
    ``|theta'| <= sway_rate_tol_rad_s``. *Failure* (terminated, reward 0) when the trolley leaves
    the rail (x < 0 or x > ``rail_length_m``) at any sub-step; failure wins over success.
    Truncation at ``max_steps`` control steps (``dt_s * max_steps`` = 40 s by default).

    **Shaping signals**: goal distance (m)::

        d = |x - target_m| + x'^2 / (2 a_max) + L sqrt(theta^2 + (theta' / Omega)^2)

    the distance to the target, plus the braking distance at the largest deceleration
    ``a_max = max_force_N / (M + m)``, plus the load's small-angle sway amplitude, with
    ``Omega = sqrt(g (M + m) / (M L))`` the sway frequency over a free trolley (``sqrt(g / L)`` when
    locked). Potential ``Phi = exp(-d / potential_scale_m)`` in [0, 1], equal to 1 at the goal
    state. It is meant to be value-like: with the defaults a start 10 m from the target has
    Phi = exp(-1/3) ~ 0.72 ~ 0.99**33, close to the discounted value (gamma = 0.99) of the
    30-odd control steps (about 6 s) a hand-tuned linear-quadratic controller needs. Both read
    the first four observation dimensions only; the ``potential_ahead`` variant takes Phi where
    the pending forces carry the crane (:meth:`~qlab.tasks.base.ControlTask.potential_ahead`).

    **Learnability** (measured, defaults unchanged; ``results/crane_learnable/CALIBRATION.md``): uniformly
    random forces settled the load in 6 of 20,000 episodes; the LQ controller above in 199 of 200, the
    fastest after 28 control steps (median 31; a bang-bang lower bound over 9 m is 26). The learners'
    default sizes over the observation space's energy bounds (+-23.5 m/s, +-pi, +-5.8 rad/s) make cells
    far wider than the tolerances (20 table bins: 1 m, 2.35 m/s, 0.31 rad, 0.58 rad/s against tolerance
    widths 0.5 m, 0.2 m/s, 0.1 rad, 0.2 rad/s): tabular and linear failed at 100k steps. Linear
    Q-learning on 8 tilings of [20, 14, 9, 7] tiles over x in [-0.25, 19.75] m, x' in +-3.5 m/s, theta in
    +-0.45 rad, theta' in +-0.7 rad/s, epsilon 0.5 -> 0.01 over 400k steps, 500k steps (``series=crane_learnable``,
    ~30-50 s a run on one core): IQM final success over seeds 5-14 of 1.00 without shaping and 0.74
    with ``potential`` (which reaches 0.5 faster, median 25k steps, but ends lower).

    **Parameters** (defaults invented, plausible for a small workshop gantry)

    ========================  =======  ==========================================================
    mass_trolley_kg           500      trolley mass M (kg)
    mass_load_kg              1000     load mass m (kg)
    rope_length_m             5        rope length L (m)
    max_force_N               2000     largest drive force (N)
    friction_N_s_m            0        viscous trolley friction b (N s/m)
    gravity_m_s2              9.81     gravitational acceleration g (m/s^2)
    rail_length_m             20       rail runs from 0 to this position (m)
    target_m                  14       target trolley position (m)
    start_position_m          (3, 5)   range of start positions (m)
    start_sway_rad            (-0.05, 0.05)  range of start sway angles (rad)
    start_sway_rate_rad_s     (0, 0)   range of start sway rates (rad/s)
    position_tol_m            0.25     success tolerance on |x - target| (m)
    speed_tol_m_s             0.1      success tolerance on |x'| (m/s)
    sway_tol_rad              0.05     success tolerance on |theta| (rad)
    sway_rate_tol_rad_s       0.1      success tolerance on |theta'| (rad/s)
    dt_s                      0.2      control step (s)
    substeps                  4        RK4 sub-steps per control step
    max_steps                 200      time cap (control steps)
    action_kind               discrete ``"discrete"`` or ``"continuous"``
    n_levels                  5        number of force levels (discrete actions)
    lock_trolley              False    hold the trolley still (pendulum alone, for testing)
    force_noise_N             0        standard deviation of the process-noise force (N)
    potential_scale_m         30       length scale of the potential Phi (m)
    dead_time_steps           0        control steps before a commanded force acts
    ========================  =======  ==========================================================
    """

    #: Progress bonus per metre of goal distance gained: a 10 m trip pays about 0.1 in total,
    #: a tenth of the success reward, so the sparse reward still dominates.
    default_progress_scale: ClassVar[float] = 0.01

    def __init__(
        self,
        mass_trolley_kg: float = 500.0,
        mass_load_kg: float = 1000.0,
        rope_length_m: float = 5.0,
        max_force_N: float = 2000.0,
        friction_N_s_m: float = 0.0,
        gravity_m_s2: float = 9.81,
        rail_length_m: float = 20.0,
        target_m: float = 14.0,
        start_position_m: tuple[float, float] = (3.0, 5.0),
        start_sway_rad: tuple[float, float] = (-0.05, 0.05),
        start_sway_rate_rad_s: tuple[float, float] = (0.0, 0.0),
        position_tol_m: float = 0.25,
        speed_tol_m_s: float = 0.1,
        sway_tol_rad: float = 0.05,
        sway_rate_tol_rad_s: float = 0.1,
        dt_s: float = 0.2,
        substeps: int = 4,
        max_steps: int = 200,
        action_kind: str = "discrete",
        n_levels: int = 5,
        lock_trolley: bool = False,
        force_noise_N: float = 0.0,
        potential_scale_m: float = 30.0,
        dead_time_steps: int = 0,
    ):
        self.mass_trolley_kg = require_positive("mass_trolley_kg", mass_trolley_kg)
        self.mass_load_kg = require_positive("mass_load_kg", mass_load_kg)
        self.rope_length_m = require_positive("rope_length_m", rope_length_m)
        self.max_force_N = require_positive("max_force_N", max_force_N)
        self.friction_N_s_m = require_non_negative("friction_N_s_m", friction_N_s_m)
        self.gravity_m_s2 = require_positive("gravity_m_s2", gravity_m_s2)
        self.rail_length_m = require_positive("rail_length_m", rail_length_m)
        self.target_m = float(target_m)
        if not 0.0 < self.target_m < self.rail_length_m:
            raise ValueError(f"target_m must lie strictly inside the rail (0, {self.rail_length_m}), got {target_m!r}")
        self.start_position_m = require_range("start_position_m", start_position_m, low=0.0)
        if self.start_position_m[1] >= self.rail_length_m:
            raise ValueError(
                f"start_position_m must lie inside the rail [0, {self.rail_length_m}), got {start_position_m!r}"
            )
        self.start_sway_rad = require_range("start_sway_rad", start_sway_rad, low=-np.pi)
        if self.start_sway_rad[1] >= np.pi:
            raise ValueError(f"start_sway_rad must lie within [-pi, pi), got {start_sway_rad!r}")
        self.start_sway_rate_rad_s = require_range("start_sway_rate_rad_s", start_sway_rate_rad_s)
        self.position_tol_m = require_positive("position_tol_m", position_tol_m)
        self.speed_tol_m_s = require_positive("speed_tol_m_s", speed_tol_m_s)
        self.sway_tol_rad = require_positive("sway_tol_rad", sway_tol_rad)
        self.sway_rate_tol_rad_s = require_positive("sway_rate_tol_rad_s", sway_rate_tol_rad_s)
        self.dt_s = require_positive("dt_s", dt_s)
        self.substeps = require_int("substeps", substeps, 1)
        self.lock_trolley = bool(lock_trolley)
        self.force_noise_N = require_non_negative("force_noise_N", force_noise_N)
        self.potential_scale_m = require_positive("potential_scale_m", potential_scale_m)

        M, m, L, g = self.mass_trolley_kg, self.mass_load_kg, self.rope_length_m, self.gravity_m_s2
        self._setup_actions(-self.max_force_N, self.max_force_N, action_kind, n_levels)
        self._setup_dead_time(dead_time_steps)
        self._setup_time_cap(max_steps)

        energy_budget_J = self.max_force_N * self.rail_length_m + 2.0 * m * g * L
        self.speed_bound_m_s = float(np.sqrt(2.0 * energy_budget_J / M))
        self.sway_rate_bound_rad_s = float(np.sqrt(2.0 * energy_budget_J * (M + m) / (m * M * L**2)))
        pending = np.full(self.dead_time_steps, self.max_force_N)
        self._obs_low = -np.concatenate([[0.0, self.speed_bound_m_s, np.pi, self.sway_rate_bound_rad_s], pending])
        self._obs_high = -self._obs_low
        self._obs_low[0], self._obs_high[0] = 0.0, self.rail_length_m
        self.observation_space = spaces.Box(
            self._obs_low.astype(np.float32), self._obs_high.astype(np.float32), dtype=np.float32
        )

        #: small-angle sway frequency (rad/s): over a free trolley, or a simple pendulum when locked
        self.sway_frequency_rad_s = float(np.sqrt(g / L) if self.lock_trolley else np.sqrt(g * (M + m) / (M * L)))
        #: largest deceleration of trolley and load together (m/s^2), for the braking distance
        self.max_decel_m_s2 = self.max_force_N / (M + m)

    # --- physics --------------------------------------------------------------------------

    def derivatives(self, state: np.ndarray, force_N: np.ndarray) -> np.ndarray:
        """Time derivative of ``(N, 4)`` states under trolley forces ``(N,)`` in N."""
        M, m, L, g = self.mass_trolley_kg, self.mass_load_kg, self.rope_length_m, self.gravity_m_s2
        v, theta, omega = state[:, 1], state[:, 2], state[:, 3]
        sin, cos = np.sin(theta), np.cos(theta)
        if self.lock_trolley:
            accel = np.zeros_like(v)
        else:
            accel = (force_N - self.friction_N_s_m * v + m * sin * (L * omega**2 + g * cos)) / (M + m * sin**2)
        alpha = -(accel * cos + g * sin) / L
        return np.stack([v, accel, omega, alpha], axis=1)

    def energy(self, state: np.ndarray) -> np.ndarray:
        """Mechanical energy T + V of each copy (J), zero with everything at rest and the load hanging."""
        M, m, L, g = self.mass_trolley_kg, self.mass_load_kg, self.rope_length_m, self.gravity_m_s2
        v, theta, omega = state[:, 1], state[:, 2], state[:, 3]
        kinetic = 0.5 * (M + m) * v**2 + m * L * v * omega * np.cos(theta) + 0.5 * m * L**2 * omega**2
        return kinetic + m * g * L * (1.0 - np.cos(theta))

    def momentum(self, state: np.ndarray) -> np.ndarray:
        """Horizontal momentum of trolley and load together (N s)."""
        M, m, L = self.mass_trolley_kg, self.mass_load_kg, self.rope_length_m
        return (M + m) * state[:, 1] + m * L * state[:, 3] * np.cos(state[:, 2])

    def sample_start(self, n: int, rng: np.random.Generator) -> np.ndarray:
        state = np.zeros((n, 4 + self.dead_time_steps))
        state[:, 0] = rng.uniform(*self.start_position_m, size=n)
        state[:, 2] = rng.uniform(*self.start_sway_rad, size=n)
        state[:, 3] = rng.uniform(*self.start_sway_rate_rad_s, size=n)
        return state

    def batch_step(self, state: np.ndarray, control: np.ndarray, rng: np.random.Generator) -> StepOutcome:
        state = np.asarray(state, dtype=np.float64)
        s = state[:, :4].copy()
        applied, pending = self._delay(state[:, 4:], np.asarray(control, dtype=np.float64).reshape(s.shape[0], -1))
        force_N = applied[:, 0]
        if self.force_noise_N > 0:
            force_N = force_N + rng.normal(0.0, self.force_noise_N, size=force_N.shape)
        if self.lock_trolley:
            s[:, 1] = 0.0
        h = self.dt_s / self.substeps
        off_rail = np.zeros(s.shape[0], dtype=bool)
        for _ in range(self.substeps):
            k1 = self.derivatives(s, force_N)
            k2 = self.derivatives(s + 0.5 * h * k1, force_N)
            k3 = self.derivatives(s + 0.5 * h * k2, force_N)
            k4 = self.derivatives(s + h * k3, force_N)
            s = s + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
            off_rail |= (s[:, 0] < 0.0) | (s[:, 0] > self.rail_length_m)
        s[:, 2] = np.mod(s[:, 2] + np.pi, 2.0 * np.pi) - np.pi
        settled = (
            (np.abs(s[:, 0] - self.target_m) <= self.position_tol_m)
            & (np.abs(s[:, 1]) <= self.speed_tol_m_s)
            & (np.abs(s[:, 2]) <= self.sway_tol_rad)
            & (np.abs(s[:, 3]) <= self.sway_rate_tol_rad_s)
        )
        success = settled & ~off_rail
        return StepOutcome(
            next_state=np.concatenate([s, pending], axis=1), base_reward=success.astype(np.float64),
            terminated=success | off_rail, success=success
        )

    # --- observation and shaping signals --------------------------------------------------

    def observe(self, state: np.ndarray) -> np.ndarray:
        s = np.array(state, dtype=np.float64).reshape(-1, self._obs_low.size)
        s[:, 2] = np.mod(s[:, 2] + np.pi, 2.0 * np.pi) - np.pi
        return np.clip(s, self._obs_low, self._obs_high).astype(np.float32)

    def goal_distance(self, obs: np.ndarray) -> np.ndarray:
        """Distance to the goal state in metres (see the class docstring), shape ``(N,)``."""
        o = np.asarray(obs, dtype=np.float64).reshape(-1, self._obs_low.size)
        sway_amplitude_rad = np.hypot(o[:, 2], o[:, 3] / self.sway_frequency_rad_s)
        braking_m = o[:, 1] ** 2 / (2.0 * self.max_decel_m_s2)
        return np.abs(o[:, 0] - self.target_m) + braking_m + self.rope_length_m * sway_amplitude_rad

    def potential(self, obs: np.ndarray) -> np.ndarray:
        """``Phi = exp(-goal_distance / potential_scale_m)`` in [0, 1], 1 at the goal state."""
        return np.exp(-self.goal_distance(obs) / self.potential_scale_m)
