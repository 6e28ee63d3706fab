"""Exact Q-functions of discounted linear-quadratic control (the calibration answer for learners).

Plant ``x[t+1] = A x[t] + B u[t] (+ w[t])``, stage cost ``c(x, u) = x'Qx + u'Ru``, discount
``gamma`` in (0, 1]. Everything here is in *cost* form; a task's reward is the negative.

* ``P`` (:func:`cost_to_go_matrix`): the optimal cost-to-go ``V*(x) = x'Px`` of the noise-free
  plant, from the discounted algebraic Riccati equation, solved as the undiscounted one for
  ``(sqrt(gamma) A, sqrt(gamma) B)``.
* ``H`` (:func:`lq_solution`): the optimal Q-function ``Q*(x, u) = [x; u]' H [x; u]`` with
  ``H = blkdiag(Q, R) + gamma [A B]' P [A B]``, and the optimal gain ``K = H_uu^-1 H_ux``
  (control ``u = -K x``).
* ``H_K`` (:func:`gain_q_matrix`): the Q-function of a fixed linear policy ``u = -K x``
  (policy evaluation through a discrete Lyapunov equation of the closed loop).
* Zero-mean process noise with covariance ``W`` leaves ``K`` unchanged and adds the constant
  :func:`noise_offset` ``gamma / (1 - gamma) tr(P W)`` to both ``V`` and ``Q``:
  ``Q_noisy(x, u) = [x; u]' H [x; u] + gamma / (1 - gamma) tr(P W)`` (same with ``P_K`` for a
  fixed gain).
* :func:`lq_reference`: all of it for a :class:`~qlab.tasks.linear_quadratic.LinearQuadratic`
  task in its reward form (:class:`LQReference`: V*, Q*, the gain and the start moment), and
  :func:`lq_states`, a uniform grid of states to compare learners on.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from qlab.validation import require_gamma, require_int, require_positive

if TYPE_CHECKING:
    from qlab.tasks.linear_quadratic import LinearQuadratic

_SYM_TOL = 1e-10  # relative tolerance for symmetry and semi-definiteness checks


def _matrix(name: str, value: ArrayLike, shape: tuple[int, int], what: str) -> np.ndarray:
    M = np.asarray(value, dtype=np.float64)
    if M.shape != shape or not np.all(np.isfinite(M)):
        got = f"shape {M.shape}" if M.shape != shape else "non-finite entries"
        raise ValueError(f"{name} must be a finite {shape[0]} x {shape[1]} matrix ({what}), got {got}")
    return M


def _symmetric(name: str, M: np.ndarray, definite: bool) -> np.ndarray:
    scale = max(1.0, float(np.max(np.abs(M))))
    kind = "positive definite" if definite else "positive semi-definite"
    if np.max(np.abs(M - M.T)) > _SYM_TOL * scale:
        raise ValueError(f"{name} must be symmetric {kind}, got an asymmetric matrix")
    M = 0.5 * (M + M.T)
    lowest = float(np.linalg.eigvalsh(M)[0])
    if (definite and lowest <= _SYM_TOL * scale) or lowest < -_SYM_TOL * scale:
        raise ValueError(f"{name} must be symmetric {kind}, got smallest eigenvalue {lowest:.3g}")
    return M


def check_dynamics(A: ArrayLike, B: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Return ``A`` (n x n) and ``B`` (n x m) as float arrays, else raise ``ValueError`` naming the matrix."""
    A = np.asarray(A, dtype=np.float64)
    if A.ndim != 2 or A.shape[0] != A.shape[1] or A.shape[0] < 1:
        raise ValueError(f"A must be a square n x n matrix, got shape {A.shape}")
    n = A.shape[0]
    B = np.asarray(B, dtype=np.float64)
    if B.ndim != 2 or B.shape[0] != n or B.shape[1] < 1:
        raise ValueError(f"B must be an n x m matrix with n = {n} rows (as A), got shape {B.shape}")
    return _matrix("A", A, A.shape, "state transition"), _matrix("B", B, B.shape, "control input")


def check_costs(Q: ArrayLike, R: ArrayLike, n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Return ``Q`` (n x n, symmetric PSD) and ``R`` (m x m, symmetric PD), else raise ``ValueError``."""
    Q = _symmetric("Q", _matrix("Q", Q, (n, n), "state cost, n x n with n = rows of A"), definite=False)
    R = _symmetric("R", _matrix("R", R, (m, m), "control cost, m x m with m = columns of B"), definite=True)
    return Q, R


def check_noise_cov(W: ArrayLike, n: int) -> np.ndarray:
    """Return the process-noise covariance ``W`` (n x n, symmetric PSD), else raise ``ValueError``."""
    return _symmetric("W", _matrix("W", W, (n, n), "process-noise covariance, n x n"), definite=False)


def check_lq_matrices(
    A: ArrayLike, B: ArrayLike, Q: ArrayLike, R: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Validate an LQ problem; returns ``(A, B, Q, R)`` as float arrays (``Q``, ``R`` symmetrised)."""
    A, B = check_dynamics(A, B)
    Q, R = check_costs(Q, R, *B.shape)
    return A, B, Q, R


def _q_matrix(A: np.ndarray, B: np.ndarray, Q: np.ndarray, R: np.ndarray, gamma: float, P: np.ndarray) -> np.ndarray:
    AB = np.hstack([A, B])
    H = scipy.linalg.block_diag(Q, R) + gamma * AB.T @ P @ AB
    return 0.5 * (H + H.T)


def cost_to_go_matrix(A: ArrayLike, B: ArrayLike, Q: ArrayLike, R: ArrayLike, gamma: float) -> np.ndarray:
    """``P`` of the optimal discounted cost-to-go ``V*(x) = x'Px`` of the noise-free plant (n x n)."""
    return _riccati(*check_lq_matrices(A, B, Q, R), require_gamma(gamma, above_zero=True))


def _riccati(A: np.ndarray, B: np.ndarray, Q: np.ndarray, R: np.ndarray, gamma: float) -> np.ndarray:
    root = np.sqrt(gamma)
    try:
        P = scipy.linalg.solve_discrete_are(root * A, root * B, Q, R)
    except (np.linalg.LinAlgError, ValueError) as err:
        raise ValueError(
            "no stabilising Riccati solution: (sqrt(gamma) A, B) must be stabilisable and "
            f"(sqrt(gamma) A, Q) detectable ({err})"
        ) from err
    return 0.5 * (P + P.T)


def lq_solution(
    A: ArrayLike, B: ArrayLike, Q: ArrayLike, R: ArrayLike, gamma: float
) -> tuple[np.ndarray, np.ndarray]:
    """Optimal gain ``K`` (m x n, ``u = -K x``) and Q-function matrix ``H`` ((n+m) x (n+m), cost form)."""
    A, B, Q, R = check_lq_matrices(A, B, Q, R)
    gamma = require_gamma(gamma, above_zero=True)
    H = _q_matrix(A, B, Q, R, gamma, _riccati(A, B, Q, R, gamma))
    n = A.shape[0]
    K = np.linalg.solve(H[n:, n:], H[n:, :n])
    return K, H


def gain_q_matrix(
    A: ArrayLike, B: ArrayLike, Q: ArrayLike, R: ArrayLike, gamma: float, K: ArrayLike
) -> np.ndarray:
    """Q-function matrix ``H_K`` (cost form) of the fixed linear policy ``u = -K x``.

    Solves ``P_K = Q + K'RK + gamma (A - BK)' P_K (A - BK)`` (a discrete Lyapunov equation) and
    returns ``blkdiag(Q, R) + gamma [A B]' P_K [A B]``. Raises ``ValueError`` unless ``K`` (m x n)
    makes the discounted closed loop stable: spectral radius of ``sqrt(gamma) (A - B K)`` < 1.
    """
    A, B, Q, R = check_lq_matrices(A, B, Q, R)
    gamma = require_gamma(gamma, above_zero=True)
    n, m = B.shape
    K = _matrix("K", K, (m, n), "feedback gain, m x n")
    closed = np.sqrt(gamma) * (A - B @ K)
    radius = float(np.max(np.abs(np.linalg.eigvals(closed))))
    if radius >= 1.0:
        raise ValueError(
            "K must stabilise the discounted closed loop: spectral radius of sqrt(gamma) (A - B K) "
            f"is {radius:.4g} >= 1"
        )
    P_K = scipy.linalg.solve_discrete_lyapunov(closed.T, Q + K.T @ R @ K)
    return _q_matrix(A, B, Q, R, gamma, 0.5 * (P_K + P_K.T))


def noise_offset(P: ArrayLike, W: ArrayLike, gamma: float) -> float:
    """Constant ``gamma / (1 - gamma) tr(P W)`` that process noise of covariance ``W`` adds to V and Q.

    ``P`` is the cost-to-go matrix (optimal, or ``P_K`` of a fixed gain); ``gamma`` must be < 1
    here, since at ``gamma = 1`` the discounted noise cost diverges.
    """
    P = np.asarray(P, dtype=np.float64)
    if P.ndim != 2 or P.shape[0] != P.shape[1]:
        raise ValueError(f"P must be a square n x n matrix, got shape {P.shape}")
    P = _symmetric("P", _matrix("P", P, P.shape, "cost-to-go"), definite=False)
    W = check_noise_cov(W, P.shape[0])
    gamma = require_gamma(gamma, above_zero=True, below_one=True, note="for a noise offset (it diverges at 1)")
    return float(gamma / (1.0 - gamma) * np.trace(P @ W))


def quadratic_cost(H: ArrayLike, x: ArrayLike, u: ArrayLike) -> np.ndarray:
    """``[x; u]' H [x; u]`` for a batch: ``x`` (N, n), ``u`` (N, m) -> (N,). Negate for a reward-form Q."""
    z = np.hstack([np.atleast_2d(np.asarray(x, dtype=np.float64)), np.atleast_2d(np.asarray(u, dtype=np.float64))])
    H = np.asarray(H, dtype=np.float64)
    if H.shape != (z.shape[1], z.shape[1]):
        raise ValueError(f"H must be (n+m) x (n+m) = {z.shape[1]} x {z.shape[1]} for these x and u, got {H.shape}")
    return np.einsum("ni,ij,nj->n", z, H, z)


@dataclass(frozen=True)
class LQReference:
    """Closed-form answers of a linear-quadratic task at one discount (matrices in cost form)."""

    A: np.ndarray
    B: np.ndarray
    Q: np.ndarray
    R: np.ndarray
    gamma: float
    noise_cov: np.ndarray | None  # W, None when noise-free
    gain: np.ndarray  # K* (m, n): u*(x) = -K* x
    q_matrix: np.ndarray  # H* (n+m, n+m): Q*(x, u) = -[x; u]' H* [x; u] - offset
    cost_to_go: np.ndarray  # P* (n, n): V*(x) = -x' P* x - offset
    offset: float  # gamma / (1 - gamma) tr(P* W) of the process noise, 0 without noise
    start_moment: np.ndarray  # E[x0 x0'] (n, n) under the task's start distribution

    def v_star(self, x: np.ndarray) -> np.ndarray:
        """V*(x) of the task's reward for a batch of states ``(N, n)`` -> ``(N,)``."""
        return -np.einsum("ni,ij,nj->n", x, self.cost_to_go, x) - self.offset

    def q_star(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Q*(x, u) of the task's reward for a batch, ``(N,)``."""
        return -quadratic_cost(self.q_matrix, x, u) - self.offset


def lq_reference(task: LinearQuadratic, gamma: float) -> LQReference:
    """Riccati solution of ``task`` at discount ``gamma``, noise constant and start moment.

    The start state is uniform in ``[start_low, start_high]``: ``E[x0 x0'] = mu mu' + diag((high - low)^2 / 12)``.
    With process noise, ``gamma`` must be < 1 (the noise cost diverges at 1).
    """
    A, B, Q, R = check_lq_matrices(task.A, task.B, task.Q, task.R)
    K, H = lq_solution(A, B, Q, R, gamma)
    P = cost_to_go_matrix(A, B, Q, R, gamma)
    W = task.noise_cov
    mid = 0.5 * (task.start_low + task.start_high)
    return LQReference(
        A=A, B=B, Q=Q, R=R, gamma=float(gamma), noise_cov=W, gain=K, q_matrix=H, cost_to_go=P,
        offset=0.0 if W is None else noise_offset(P, W, gamma),
        start_moment=np.outer(mid, mid) + np.diag((task.start_high - task.start_low) ** 2 / 12.0),
    )


def lq_states(n_state: int, half_width: float, n_points: int) -> tuple[np.ndarray, np.ndarray]:
    """A uniform grid over ``[-half_width, half_width]^n_state``: the axis ``(k,)`` and the states ``(k^n, n)``.

    ``k = n_points`` for one or two dimensions, else ``max(2, round(n_points^(2 / n_state)))``; the
    states are in C order (the last dimension varies fastest).
    """
    require_positive("state grid half width", half_width)
    require_int("state grid points", n_points, 2)
    per_axis = int(n_points) if n_state <= 2 else max(2, round(n_points ** (2.0 / n_state)))
    axis = np.linspace(-half_width, half_width, per_axis)
    mesh = np.meshgrid(*[axis] * n_state, indexing="ij")
    return axis, np.stack([g.ravel() for g in mesh], axis=1)
