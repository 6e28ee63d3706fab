"""LinearQuadratic: a linear plant with quadratic cost, whose Q-function is known in closed form."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from gymnasium import spaces
from numpy.typing import ArrayLike

from qlab.reference.lq import check_costs, check_dynamics, check_noise_cov
from qlab.tasks.base import ControlTask, StepOutcome
from qlab.validation import require_positive


def double_integrator(dt_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-order-hold sampling of ``pos'' = u``: ``A = [[1, dt], [0, 1]]``, ``B = [[dt^2/2], [dt]]``."""
    dt_s = require_positive("dt_s", dt_s)
    return np.array([[1.0, dt_s], [0.0, 1.0]]), np.array([[0.5 * dt_s**2], [dt_s]])


def _per_dim(name: str, value: float | Sequence[float], size: int) -> np.ndarray:
    """A number or a list of ``size`` numbers as a finite float array of shape ``(size,)``."""
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(size, float(arr))
    if arr.shape != (size,) or not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be a finite number or a list of {size} finite numbers, got {value!r}")
    return arr


class LinearQuadratic(ControlTask):
    """Linear plant ``x[t+1] = A x[t] + B u[t] + w[t]`` with reward ``-(x[t]'Q x[t] + u[t]'R u[t])``.

    The calibration task: its optimal Q-function is ``-[x; u]' H [x; u]`` (minus a constant
    when there is noise), with ``H`` from :func:`qlab.reference.lq.lq_solution`.

    * Observation: the state ``x`` itself, float32, ``Box(-inf, inf, (n,))`` (unbounded: the
      plant has no terminal states; gymnasium's checker may warn about the infinite bounds).
    * Action: ``action_kind="continuous"`` (default) is a vector of ``m`` controls, clipped to
      ``[-control_bound, control_bound]``; ``control_bound=None`` switches clipping off and the
      action space becomes ``Box(-inf, inf)``. ``action_kind="discrete"`` picks one of ``n_levels``
      evenly spaced levels in ``[-control_bound, control_bound]`` (needs a finite bound; with
      ``m > 1`` level ``k`` sets every control to the same fraction of its range).
    * Reward: ``-(x'Qx + u'Ru)`` for the state before the step and the control actually
      applied (after clipping). Dense already, so the only shaping variant is ``none``.
    * Start state: uniform in the box ``[start_low, start_high]``.
    * Episode end: never terminated and never a success; truncated at ``max_steps``.

    Parameters: ``A`` (n x n), ``B`` (n x m), ``Q`` (n x n, symmetric PSD, default identity),
    ``R`` (m x m, symmetric PD, default ``0.1 I``), ``noise_cov`` (``W``, n x n, symmetric PSD,
    ``w ~ N(0, W)``; ``None``: noise-free). Without ``A``/``B`` the plant is a double integrator
    sampled every ``dt_s`` seconds: state (position m, velocity m/s), control acceleration m/s^2.
    The default ``control_bound`` of 10 m/s^2 keeps the optimal control ``-K x`` of the default
    plant unclipped along trajectories from the default start box (``|K x| < 6.1`` for discounts
    0.5 to 1), so the closed-form Q-function holds there.
    """

    shaping_variants = ("none",)

    def __init__(
        self,
        A: ArrayLike | None = None,
        B: ArrayLike | None = None,
        Q: ArrayLike | None = None,
        R: ArrayLike | None = None,
        noise_cov: ArrayLike | None = None,
        dt_s: float = 0.1,
        control_bound: float | Sequence[float] | None = 10.0,
        action_kind: str = "continuous",
        n_levels: int = 5,
        start_low: float | Sequence[float] = -1.0,
        start_high: float | Sequence[float] = 1.0,
        max_steps: int = 200,
    ):
        default_A, default_B = double_integrator(dt_s) if A is None or B is None else (None, None)
        self.A, self.B = check_dynamics(default_A if A is None else A, default_B if B is None else B)
        n, m = self.B.shape
        self.Q, self.R = check_costs(np.eye(n) if Q is None else Q, 0.1 * np.eye(m) if R is None else R, n, m)
        self.noise_cov = None if noise_cov is None else check_noise_cov(noise_cov, n)
        # w = z L' with z ~ N(0, I) and L L' = W; eigen-factor so a singular W is fine
        if self.noise_cov is None:
            self._noise_factor = None
        else:
            eigval, eigvec = np.linalg.eigh(self.noise_cov)
            self._noise_factor = eigvec * np.sqrt(np.clip(eigval, 0.0, None))

        self.start_low = _per_dim("start_low", start_low, n)
        self.start_high = _per_dim("start_high", start_high, n)
        if np.any(self.start_low > self.start_high):
            raise ValueError(f"start_low must be <= start_high in every dimension, got {start_low!r}, {start_high!r}")

        if control_bound is None:
            if action_kind == "discrete":
                raise ValueError("control_bound must be finite (not None) for action_kind='discrete'")
            bound = np.full(m, np.inf)
        else:
            bound = _per_dim("control_bound", control_bound, m)
            if np.any(bound <= 0):
                raise ValueError(f"control_bound must be > 0 in every dimension, got {control_bound!r}")
        self._setup_actions(-bound, bound, action_kind, n_levels, clip=control_bound is not None)
        self._setup_time_cap(max_steps)
        self.observation_space = spaces.Box(-np.inf, np.inf, shape=(n,), dtype=np.float32)

    def sample_start(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return rng.uniform(self.start_low, self.start_high, size=(n, self.start_low.size))

    def batch_step(self, state: np.ndarray, control: np.ndarray, rng: np.random.Generator) -> StepOutcome:
        x = np.asarray(state, dtype=np.float64)
        u = np.asarray(control, dtype=np.float64)
        cost = np.einsum("ni,ij,nj->n", x, self.Q, x) + np.einsum("ni,ij,nj->n", u, self.R, u)
        next_state = x @ self.A.T + u @ self.B.T
        if self._noise_factor is not None:
            next_state = next_state + rng.standard_normal(x.shape) @ self._noise_factor.T
        never = np.zeros(x.shape[0], dtype=bool)
        return StepOutcome(next_state=next_state, base_reward=-cost, terminated=never, success=never.copy())

    def observe(self, state: np.ndarray) -> np.ndarray:
        return np.asarray(state, dtype=np.float32)

    def goal_distance(self, obs: np.ndarray) -> np.ndarray:
        """Euclidean norm of the state (the origin is the regulation target)."""
        return np.linalg.norm(np.asarray(obs, dtype=np.float64), axis=-1)

    def potential(self, obs: np.ndarray) -> np.ndarray:
        """``exp(-||x||)``: 1 at the origin (for the base-class contract; no shaping uses it here)."""
        return np.exp(-self.goal_distance(obs))
