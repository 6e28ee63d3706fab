"""Kiln: fire a batch along a ramp-soak-cool schedule with a burner that acts after a dead time."""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from gymnasium import spaces

from qlab.tasks.base import ControlTask, StepOutcome
from qlab.validation import require_int, require_non_negative, require_positive, require_range

#: Absolute zero (degC), the lowest temperature a start range may name.
ABSOLUTE_ZERO_DEGC = -273.15




class Kiln(ControlTask):
    """Kiln firing: hold a batch in the soak band long enough without heating or cooling too fast.

    **Physics**: the kiln temperature ``T`` (degC) is a first-order thermal lag towards ambient
    plus the burner's heating::

        dT/dt = (T_amb - T) / tau + gain * u_applied(t)

    with ``T_amb = ambient_degC``, ``tau = time_constant_s`` and ``gain = heating_rate_degC_per_s``
    (the heating rate of the full burner, u = 1, at ambient temperature). The burner power is
    held for each control step of ``dt_s`` seconds (zero-order hold) and the step is integrated
    exactly::

        T_ss   = T_amb + gain * tau * u_applied          (steady state of that power level)
        T[k+1] = T_ss + (T[k] - T_ss) * exp(-dt_s / tau)

    so without noise T never leaves ``[T_amb, T_amb + gain * tau]`` once inside it.

    **Dead time**: the burner command issued at step ``k`` acts during step
    ``k + dead_time_steps``: ``u_applied[k] = u[k - dead_time_steps]``. The commands issued but not
    yet acting wait in a first-in first-out queue in the state, oldest first; the queue starts
    with the burner off (zeros). With ``dead_time_steps = 0`` the command acts at once.

    **Schedule**: ``ramp_steps`` steps of heating, ``soak_steps`` of soaking, ``cool_steps`` of
    cooling; the batch ends after ``schedule_steps = ramp_steps + soak_steps + cool_steps`` steps.
    The phases are the nominal profile a rule-based controller follows (heat to the band, hold,
    cool); the score below depends only on what happened, not on which phase it happened in.

    **Score**: a step *soaks* if the temperature at its end lies inside ``soak_band_degC``
    (inclusive); it adds ``dt_s`` to the accumulated soak time. A step *violates the ramp limit*
    if ``|T[k+1] - T[k]| > ramp_limit_degC_per_h * dt_s / 3600`` (heating and cooling alike, noise
    included). The batch is *good* iff the accumulated soak time is at least ``required_soak_h``
    (rounded up to whole steps) and the number of violations is at most
    ``allowed_ramp_violations``.

    **State** (float64): step index k, temperature T (degC), soak steps accumulated, ramp-limit
    violations, then the ``dead_time_steps`` pending burner commands (power in [0, 1], oldest
    first).

    **Observation** ``Box`` float32: ``[k / schedule_steps, T (degC), soak time (h), violations]``
    followed, with ``observe_pending=True`` (default), by the pending commands: a Markov
    observation. With ``observe_pending=False`` the pending commands are hidden and the task is
    *partially observed*: the same temperature and history can hide different burner commands
    already on their way (the physics is unchanged, only the observation is shorter). Bounds:
    fraction [0, 1]; T in ``[min(T_amb, start low), max(start high, T_amb + gain * tau)]`` (the
    state is clipped there, which only ever acts on noise); soak time in [0, schedule duration];
    violations in [0, schedule_steps]; pending commands in [0, 1].

    **Action**: ``action_kind="discrete"``: ``n_levels`` evenly spaced burner powers from 0 to 1
    (0, 0.25, 0.5, 0.75, 1 by default). ``"continuous"``: a power clipped to [0, 1].

    **Reward**: on the last step of the schedule 1 if the batch is good, else 0; 0 on every other
    step. ``success`` is True on that last step iff the batch is good.

    **Start state**: k = 0, T uniform in ``start_temperature_degC``, no soak time, no violations,
    burner off (all pending commands 0).

    **Episode end**: *terminated* at the end of the schedule (step ``schedule_steps``), good batch
    or not; this is the batch's end, not a time cap. ``max_steps = schedule_steps + 1``, so the
    time-cap truncation never pre-empts it.

    **Noise**: optional process noise adds a Gaussian disturbance of standard deviation
    ``temperature_noise_degC`` to T at the end of every step (default 0: deterministic).

    **Shaping signals**: with ``f`` the fraction of the required soak steps accumulated (capped at
    1), ``gap`` the distance (degC) from T to the soak band (0 inside it) and ``gap_max`` the
    largest gap within the temperature bounds, the potential is::

        Phi = alive * (f + (1 - f) * 0.5 * (1 - gap / gap_max))

    where ``alive`` is 1 while the batch can still be good (violations within the allowance and
    enough schedule left to finish the soak) and 0 otherwise. Phi lies in [0, 1]: about 0 for a
    cold kiln, 0.5 on entering the band, rising to 1 once the soak is complete: a rough estimate
    of the chance the batch comes out good. The goal distance (h) is the soak time still
    needed plus the time to reach the band at the ramp limit::

        d = max(0, required_soak_h - soak_h) + gap / ramp_limit_degC_per_h   (soak in whole steps)

    about 5.9 h from a cold start with the defaults; ``default_progress_scale = 0.05`` per hour
    pays about 0.3 in total over a perfect batch, under a third of the success reward. The
    ``potential_ahead`` variant takes Phi after the pending commands have acted
    (:meth:`~qlab.tasks.base.ControlTask.potential_ahead`); it needs them in the observation, so
    ``observe_pending=False`` does not offer it.

    **Defaults** (invented, chosen so that a rule-based controller that looks ahead through the
    pending commands succeeds while a random controller almost never does): 5 min steps, tau =
    7,500 s, full-power steady state 1,520 degC, soak band 1,180-1,220 degC held for 2 h, ramp
    limit 300 degC/h (25 degC per step) with 2 excursions allowed, dead time 4 steps (20 min),
    schedule 7 h ramp + 2.5 h soak + 2 h cool = 138 steps. The burner levels are 375 degC of
    steady state apart, so under the level whose steady state lies just above or just below T,
    T moves by at most 375 * (1 - exp(-dt_s / tau)) = 14.7 degC per step: some level always keeps
    the ramp within the limit. Full power on a cold kiln heats by 59 degC per step, far over it.
    Measured with the defaults: a controller that predicts T through the pending commands and
    picks the level landing nearest the band centre within the ramp limit reaches the band after
    about 73 steps and fires good batches; the same rule applied to the current T (ignoring the
    pending commands) overshoots the band and fails; uniformly random levels failed in 20,000 of
    20,000 batches (on average 48 violations and no soak).
    """

    #: Goal distance is in hours; 0.05 per hour pays ~0.3 over a perfect batch (see above).
    default_progress_scale: ClassVar[float] = 0.05

    def __init__(
        self,
        *,
        dt_s: float = 300.0,
        ambient_degC: float = 20.0,
        time_constant_s: float = 7500.0,
        heating_rate_degC_per_s: float = 0.2,
        dead_time_steps: int = 4,
        soak_band_degC: tuple[float, float] = (1180.0, 1220.0),
        required_soak_h: float = 2.0,
        ramp_limit_degC_per_h: float = 300.0,
        allowed_ramp_violations: int = 2,
        ramp_steps: int = 84,
        soak_steps: int = 30,
        cool_steps: int = 24,
        start_temperature_degC: tuple[float, float] = (20.0, 40.0),
        temperature_noise_degC: float = 0.0,
        action_kind: str = "discrete",
        n_levels: int = 5,
        observe_pending: bool = True,
    ):
        self.dt_s = require_positive("dt_s", dt_s)
        self.time_constant_s = require_positive("time_constant_s", time_constant_s)
        self.heating_rate_degC_per_s = require_positive("heating_rate_degC_per_s", heating_rate_degC_per_s)
        if not np.isfinite(ambient_degC) or ambient_degC < ABSOLUTE_ZERO_DEGC:
            raise ValueError(f"ambient_degC must be a finite temperature >= {ABSOLUTE_ZERO_DEGC}, got {ambient_degC!r}")
        self.ambient_degC = float(ambient_degC)
        self.ramp_steps = require_int("ramp_steps", ramp_steps, 1)
        self.soak_steps = require_int("soak_steps", soak_steps, 1)
        self.cool_steps = require_int("cool_steps", cool_steps, 0)
        self.schedule_steps = self.ramp_steps + self.soak_steps + self.cool_steps
        self.ramp_limit_degC_per_h = require_positive("ramp_limit_degC_per_h", ramp_limit_degC_per_h)
        self.allowed_ramp_violations = require_int("allowed_ramp_violations", allowed_ramp_violations, 0)
        self.temperature_noise_degC = require_non_negative("temperature_noise_degC", temperature_noise_degC)
        self.start_temperature_degC = require_range("start_temperature_degC", start_temperature_degC,
                                                    low=ABSOLUTE_ZERO_DEGC)
        self.observe_pending = bool(observe_pending)

        self.full_power_degC = self.ambient_degC + self.heating_rate_degC_per_s * self.time_constant_s
        band = tuple(float(v) for v in soak_band_degC)
        if not (len(band) == 2 and self.ambient_degC < band[0] < band[1] < self.full_power_degC):
            raise ValueError(
                "soak_band_degC must be a (low, high) pair with ambient_degC < low < high < ambient_degC + "
                f"heating_rate_degC_per_s * time_constant_s = {self.full_power_degC} (reachable), "
                f"got {soak_band_degC!r}"
            )
        self.soak_band_degC = band
        self.dt_h = self.dt_s / 3600.0
        self.required_soak_h = require_positive("required_soak_h", required_soak_h)
        self.required_soak_steps = int(np.ceil(self.required_soak_h / self.dt_h - 1e-9))
        if self.required_soak_steps > self.schedule_steps:
            raise ValueError(
                f"required_soak_h must fit in the schedule (<= {self.schedule_steps * self.dt_h} h), "
                f"got {required_soak_h!r}"
            )

        self.decay = float(np.exp(-self.dt_s / self.time_constant_s))
        self.ramp_limit_degC_per_step = self.ramp_limit_degC_per_h * self.dt_h
        self.temperature_low_degC = min(self.ambient_degC, self.start_temperature_degC[0])
        self.temperature_high_degC = max(self.start_temperature_degC[1], self.full_power_degC)
        self.gap_max_degC = max(band[0] - self.temperature_low_degC, self.temperature_high_degC - band[1])

        self._setup_actions(0.0, 1.0, action_kind, n_levels)
        self._setup_dead_time(dead_time_steps)
        self._setup_time_cap(self.schedule_steps + 1)
        if not self.observe_pending:  # the look-ahead needs the pending commands in the observation
            self.shaping_variants = tuple(v for v in Kiln.shaping_variants if v != "potential_ahead")
        n_shown = self.pending_in_observation
        low = np.concatenate([[0.0, self.temperature_low_degC, 0.0, 0.0], np.zeros(n_shown)])
        high = np.concatenate([[1.0, self.temperature_high_degC, self.schedule_steps * self.dt_h,
                                float(self.schedule_steps)], np.ones(n_shown)])
        self.observation_space = spaces.Box(low.astype(np.float32), high.astype(np.float32), dtype=np.float32)

    # --- physics --------------------------------------------------------------------------

    def sample_start(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Cold kilns at the start of the schedule: ``(n, 4 + dead_time_steps)``, burner off."""
        state = np.zeros((n, 4 + self.dead_time_steps))
        state[:, 1] = rng.uniform(*self.start_temperature_degC, size=n)
        return state

    def batch_step(self, state: np.ndarray, control: np.ndarray, rng: np.random.Generator) -> StepOutcome:
        """One control step of ``dt_s`` for every copy: dead-time queue, exact first-order lag, scoring."""
        step, temp, soak, violations = state[:, 0], state[:, 1], state[:, 2], state[:, 3]
        applied, queue = self._delay(state[:, 4:], control[:, :1])
        applied = applied[:, 0]
        steady = self.ambient_degC + self.heating_rate_degC_per_s * self.time_constant_s * applied
        new_temp = steady + (temp - steady) * self.decay
        if self.temperature_noise_degC > 0:
            new_temp = new_temp + self.temperature_noise_degC * rng.standard_normal(new_temp.shape)
        new_temp = np.clip(new_temp, self.temperature_low_degC, self.temperature_high_degC)

        lo, hi = self.soak_band_degC
        new_soak = soak + ((new_temp >= lo) & (new_temp <= hi))
        new_violations = violations + (np.abs(new_temp - temp) > self.ramp_limit_degC_per_step)
        new_step = step + 1
        terminated = new_step >= self.schedule_steps
        good = (new_soak >= self.required_soak_steps) & (new_violations <= self.allowed_ramp_violations)
        success = terminated & good
        next_state = np.column_stack([new_step, new_temp, new_soak, new_violations, queue])
        return StepOutcome(next_state, success.astype(np.float64), terminated, success)

    def observe(self, state: np.ndarray) -> np.ndarray:
        """``[schedule fraction, T (degC), soak time (h), violations, pending commands...]`` as float32."""
        head = np.column_stack([state[:, 0] / self.schedule_steps, state[:, 1], state[:, 2] * self.dt_h, state[:, 3]])
        obs = np.concatenate([head, state[:, 4:]], axis=1) if self.observe_pending else head
        return obs.astype(np.float32)

    @property
    def pending_in_observation(self) -> int:
        """The pending commands shown: all of them, or none with ``observe_pending=False``."""
        return self.dead_time_steps if self.observe_pending else 0

    def state_from_observation(self, obs: np.ndarray) -> np.ndarray:
        """The state behind observations that show the pending commands (step and soak back to whole steps)."""
        o = np.asarray(obs, dtype=np.float64)
        head = np.column_stack([np.rint(o[:, 0] * self.schedule_steps), o[:, 1], np.rint(o[:, 2] / self.dt_h), o[:, 3]])
        return np.concatenate([head, o[:, 4:]], axis=1)

    # --- shaping signals ------------------------------------------------------------------

    def _soak_steps_needed(self, obs: np.ndarray) -> np.ndarray:
        soak_done = np.rint(obs[:, 2].astype(np.float64) / self.dt_h)
        return np.maximum(0.0, self.required_soak_steps - soak_done)

    def _band_gap(self, obs: np.ndarray) -> np.ndarray:
        temp = obs[:, 1].astype(np.float64)
        lo, hi = self.soak_band_degC
        return np.maximum(0.0, np.maximum(lo - temp, temp - hi))

    def potential(self, obs: np.ndarray) -> np.ndarray:
        """Phi = alive * (f + (1 - f) * 0.5 * (1 - gap / gap_max)) in [0, 1] (see the class docstring)."""
        obs = np.asarray(obs)
        soak_needed = self._soak_steps_needed(obs)
        steps_left = np.rint((1.0 - obs[:, 0].astype(np.float64)) * self.schedule_steps)
        alive = (obs[:, 3] <= self.allowed_ramp_violations) & (steps_left >= soak_needed)
        f = 1.0 - soak_needed / self.required_soak_steps
        closeness = np.clip(1.0 - self._band_gap(obs) / self.gap_max_degC, 0.0, 1.0)
        return np.where(alive, f + (1.0 - f) * 0.5 * closeness, 0.0)

    def goal_distance(self, obs: np.ndarray) -> np.ndarray:
        """Hours still needed: missing soak time plus the gap to the band at the ramp limit."""
        obs = np.asarray(obs)
        return self._soak_steps_needed(obs) * self.dt_h + self._band_gap(obs) / self.ramp_limit_degC_per_h
