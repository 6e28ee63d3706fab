"""Where a learned Q-function goes wrong, measured against the exact Dock grid model (and LQ closed form).

The exact answers come from :mod:`qlab.reference` (:func:`~qlab.reference.dock_answers.grid_reference`,
:func:`~qlab.reference.lq.lq_reference`); this module compares learners with them. It asks a
learner only for the protocol and its optional capabilities (``linear_features``,
``fit_function_class``, ``quadratic_head``: see :mod:`qlab.learners.protocol`), never for its class.

* :func:`learned_q_on_grid`: the learner's Q at the observations of the grid nodes.
* :func:`value_maps`: learned V, V* and where the greedy action is not optimal, as
  ``(n_position, n_velocity)`` pictures.
* :func:`policy_loss`: V*(s0) - V^pi(s0) on the task's own reward for the learner's greedy policy.
* :func:`error_split`: RMS error of Q against Q* split into approximation (the best fit of Q*
  inside the learner's function class, :func:`approximation_error`) and what learning left on top.
* :func:`lq_diagnostics`: gain, Q-matrix and cost of an LSTD-Q learner on the linear-quadratic task.
* :func:`lq_value_maps`, :func:`lq_policy_loss`, :func:`lq_error_split`: the same maps, policy
  loss and error split for the linear-quadratic task against the closed form, on a uniform grid
  of states over a box (:func:`~qlab.reference.lq.lq_states`).

All grid quantities are over the live grid nodes (not the two absorbing nodes), every node and
action weighted alike. Learners always see observations, ``task.observe(node)``, never raw states.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from qlab.learners.protocol import QuadraticHead
from qlab.reference.dock_answers import GridReference
from qlab.reference.finite_mdp import evaluate_policy
from qlab.reference.lq import LQReference, check_lq_matrices, cost_to_go_matrix, gain_q_matrix, lq_solution, lq_states
from qlab.validation import require_int, require_positive

#: An action counts as optimal when its Q* is within this much of V* (times max(1, max |Q*|)).
TIE_TOLERANCE = 1e-9


def learned_q_on_grid(learner: Any, ref: GridReference) -> np.ndarray:
    """``learner.q_values`` at the observation of every grid node, ``(n_grid, A)`` float64 (one batch)."""
    q = np.asarray(learner.q_values(ref.observations), dtype=np.float64)
    if q.shape != ref.q_star.shape:
        raise ValueError(f"learner.q_values must return shape (n_grid, n_actions) = {ref.q_star.shape}, got {q.shape}")
    return q


def _rms(x: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(x))))


def _optimal(q_star: np.ndarray, actions: np.ndarray) -> np.ndarray:
    """Whether each node's ``action`` is optimal for ``q_star`` (values compared, so ties count as optimal)."""
    tolerance = TIE_TOLERANCE * max(1.0, float(np.max(np.abs(q_star))))
    chosen = np.take_along_axis(q_star, actions[:, None], axis=1)[:, 0]
    return chosen >= q_star.max(axis=1) - tolerance


@dataclass(frozen=True)
class ValueMaps:
    """Pictures over the grid, each ``(n_position, n_velocity)``, with the axes they are drawn on."""

    positions_m: np.ndarray  # (n_position,)
    velocities_m_s: np.ndarray  # (n_velocity,)
    learned_v: np.ndarray  # max_a Q(s, a) of the learner
    optimal_v: np.ndarray  # V* of the variant's rewards
    disagreement: np.ndarray  # bool: the learner's greedy action is not optimal for the variant's Q*


def value_maps(learner: Any, ref: GridReference) -> ValueMaps:
    """Learned V, V* and the greedy-policy disagreement mask on the grid, ready to plot."""
    q = learned_q_on_grid(learner, ref)
    shape = (ref.grid.n_position, ref.grid.n_velocity)
    return ValueMaps(
        positions_m=ref.grid.positions_m,
        velocities_m_s=ref.grid.velocities_m_s,
        learned_v=q.max(axis=1).reshape(shape),
        optimal_v=ref.v_star.reshape(shape),
        disagreement=~_optimal(ref.q_star, q.argmax(axis=1)).reshape(shape),
    )


def policy_loss(learner: Any, ref: GridReference) -> float:
    """V*(s0) - V^pi(s0) on the task's own reward, pi greedy for the learner at the grid nodes (ties: lowest index).

    Both values come from the same grid model (exact policy evaluation); s0 is the start distribution.
    """
    actions = learned_q_on_grid(learner, ref).argmax(axis=1)
    policy = np.zeros(ref.base_reward.shape)
    policy[np.arange(actions.size), actions] = 1.0
    policy[actions.size :, 0] = 1.0  # absorbing nodes: any action
    v_pi = evaluate_policy(ref.model, ref.base_reward, ref.gamma, policy)
    return float(ref.start_weights @ (ref.v_star_base - v_pi))


def best_fit(learner: Any, ref: GridReference, network_steps: int | None = None) -> np.ndarray:
    """The best fit of ``ref.q_star`` inside the learner's function class, ``(n_grid, A)``.

    Asks the learner's ``fit_function_class`` (:mod:`qlab.learners.protocol`), which uses its
    feature map or architecture, never its weights, so the fit depends on the learner's class and
    config only. Linear classes (TabularQ, LinearQ, discrete LSTDQ): least squares per action over
    the grid nodes, uniform weights; for a table, the mean of Q* over the nodes in each cell.
    QNetLearner: the same network architecture trained on Q* by full-batch Adam
    (``network_steps`` steps, None: the learner's default; fixed seed, one torch thread): an upper
    bound of the best fit, as training need not reach the optimum.
    """
    fit = getattr(learner, "fit_function_class", None)
    if fit is None:
        raise ValueError(
            "learner must offer fit_function_class(observations, targets, steps) for a best fit in its function "
            f"class (see qlab.learners.protocol), got {type(learner).__name__} without it"
        )
    if network_steps is not None:
        require_int("network_steps", network_steps, 1)
    return fit(ref.observations, ref.q_star, network_steps)


def approximation_error(learner: Any, ref: GridReference, network_steps: int | None = None) -> float:
    """RMS distance from Q* to its best fit in the learner's function class (see :func:`best_fit`).

    Independent of the learner's weights and seed: compute it once per class and config.
    """
    return _rms(best_fit(learner, ref, network_steps) - ref.q_star)


@dataclass(frozen=True)
class ErrorSplit:
    """RMS errors of a learned Q against Q* over the live grid state-action pairs."""

    total: float  # RMS of Q - Q*
    approximation: float  # RMS of (best fit in the class) - Q*
    remainder: float | None  # linear classes: sqrt(total^2 - approximation^2), what learning left; else None


def error_split(learner: Any, ref: GridReference, approximation: float | None = None) -> ErrorSplit:
    """Split the error of the learner's Q into approximation and the remainder left by learning.

    ``approximation``: a value from :func:`approximation_error` for this learner's class and
    config, to reuse across seeds; computed here when None. For a class linear in its weights
    the learned Q lies in the span the best fit projects onto, so the squared errors add
    (Pythagoras for an orthogonal projection) and the remainder is the RMS distance of Q from the
    best fit. A network is no linear space: both numbers are reported, no remainder.
    """
    total = _rms(learned_q_on_grid(learner, ref) - ref.q_star)
    approx = approximation_error(learner, ref) if approximation is None else float(approximation)
    linear = getattr(learner, "linear_features", None) is not None  # Q in the span of its features
    remainder = float(np.sqrt(max(total**2 - approx**2, 0.0))) if linear else None
    return ErrorSplit(total=total, approximation=approx, remainder=remainder)


# --- linear-quadratic -----------------------------------------------------------------------


#: LQ maps and error split: states on a uniform grid over [-half width, half width] in every state dimension,
#: this many points per axis of a 2-D state (higher dimensions: fewer per axis, about as many states in all).
LQ_BOX_HALF_WIDTH = 3.0
LQ_GRID_POINTS = 41
#: error split: actions per state and action dimension, evenly spread over u*(x) +- LQ_ACTION_HALF_WIDTH
LQ_ACTION_POINTS = 9
LQ_ACTION_HALF_WIDTH = 3.0


def _quadratic_head(learner: Any) -> QuadraticHead:
    """The learner's ``quadratic_head`` (:mod:`qlab.learners.protocol`), else ``ValueError``."""
    head = getattr(learner, "quadratic_head", None)
    if head is None:
        raise ValueError(
            "learner must offer a quadratic_head (a quadratic Q of [x; u], e.g. LSTDQ with continuous actions and "
            f"quadratic features; see qlab.learners.protocol), got {type(learner).__name__} without one"
        )
    return head


@dataclass(frozen=True)
class LQDiagnostics:
    """An LSTD-Q learner's quadratic Q-function against the closed form (Frobenius norms)."""

    gain_error: float  # |K - K*| / |K*|, K the gain the learner acts with (u = -K x + k)
    q_matrix_error: float  # |H - H*| / |H*|, H the learner's cost-form Q matrix (minus its weights' matrix)
    cost_ratio: float  # tr(P_K) / tr(P*): cost of u = -K x against the optimum, x0 ~ N(0, I); inf if unstable


def lq_diagnostics(learner: Any, A: ArrayLike, B: ArrayLike, Q: ArrayLike, R: ArrayLike, gamma: float) -> LQDiagnostics:
    """Compare a continuous-action LSTD-Q learner (quadratic features of ``[x; u]``) with ``lq_solution``.

    The learner's ``Q(x, u) = z'Mz + g'z + c`` (reward form, ``z = [x; u]``) gives ``H = -M``;
    its linear term, constant and control offset ``k`` are not scored (all zero at the optimum
    of the noise-free plant; noise moves only the constant).
    """
    head = _quadratic_head(learner)
    A, B, Q, R = check_lq_matrices(A, B, Q, R)
    K_star, H_star = lq_solution(A, B, Q, R, gamma)
    M, _, _ = head.form()
    if M.shape != H_star.shape:
        raise ValueError(f"the learner's Q matrix is {M.shape}, but A, B give a {H_star.shape} Q matrix")
    K = head.gain
    n = A.shape[0]
    try:
        H_K = gain_q_matrix(A, B, Q, R, gamma, K)
    except ValueError:  # K does not stabilise the discounted closed loop: unbounded cost
        cost_ratio = np.inf
    else:
        closed = np.vstack([np.eye(n), -K])  # V_K(x) = Q_K(x, -K x) = x' P_K x
        cost_ratio = float(np.trace(closed.T @ H_K @ closed) / np.trace(cost_to_go_matrix(A, B, Q, R, gamma)))
    return LQDiagnostics(
        gain_error=float(np.linalg.norm(K - K_star) / np.linalg.norm(K_star)),
        q_matrix_error=float(np.linalg.norm(-M - H_star) / np.linalg.norm(H_star)),
        cost_ratio=cost_ratio,
    )


def _learned_control(head: QuadraticHead, x: np.ndarray) -> np.ndarray:
    """The learner's greedy control ``u = -K x + k`` without clipping (the closed form has no bounds)."""
    return head.offset - x @ head.gain.T


@dataclass(frozen=True)
class LQMaps:
    """Pictures over a grid of 2-D states, each ``(n_points, n_points)`` indexed ``[x1, x2]``."""

    x1: np.ndarray  # (n_points,)
    x2: np.ndarray  # (n_points,)
    learned_v: np.ndarray  # Q of the learner at its greedy control (max_u Q when Q is concave in u)
    optimal_v: np.ndarray  # V* of the task's reward
    action_distance: np.ndarray  # |u(x) - u*(x)| (Euclidean, the task's control units)
    labels: tuple[str, str]  # axis labels of x1 and x2


def lq_value_maps(learner: Any, ref: LQReference, half_width: float = LQ_BOX_HALF_WIDTH,
                  n_points: int = LQ_GRID_POINTS, labels: tuple[str, str] = ("state x1", "state x2")) -> LQMaps:
    """Learned V, V* and the distance between the learner's greedy control and u* on a grid of 2-D states.

    Learned V is ``Q(x, u(x))`` with ``u(x) = -K x + k`` the learner's unclipped greedy control,
    which is ``max_u Q(x, u)`` whenever its quadratic form is concave in ``u`` (the learner keeps
    its previous gain otherwise). Raises ``ValueError`` unless the state is 2-D.
    """
    head = _quadratic_head(learner)
    if ref.A.shape[0] != 2:
        raise ValueError(f"value maps need a 2-D state, got {ref.A.shape[0]} state dimensions")
    axis, x = lq_states(2, half_width, n_points)
    u = _learned_control(head, x)
    shape = (axis.size, axis.size)
    return LQMaps(
        x1=axis,
        x2=axis.copy(),
        learned_v=learner.q(x, u).reshape(shape),
        optimal_v=ref.v_star(x).reshape(shape),
        action_distance=np.linalg.norm(u + x @ ref.gain.T, axis=1).reshape(shape),
        labels=labels,
    )


def lq_policy_loss(learner: Any, ref: LQReference) -> float:
    """``E[V*(x0) - V^K(x0)]`` over the task's start distribution for the learner's gain ``K`` (inf if unstable).

    ``V^K(x) = -x' P_K x - gamma / (1 - gamma) tr(P_K W)`` with ``P_K`` from the discrete Lyapunov
    equation of ``sqrt(gamma) (A - B K)``; the learner's control offset ``k`` and the task's
    control clipping are not scored (the closed form has neither).
    """
    K = _quadratic_head(learner).gain
    closed = np.sqrt(ref.gamma) * (ref.A - ref.B @ K)
    if np.max(np.abs(np.linalg.eigvals(closed))) >= 1.0:
        return float("inf")
    P_K = scipy.linalg.solve_discrete_lyapunov(closed.T, ref.Q + K.T @ ref.R @ K)
    gap = 0.5 * (P_K + P_K.T) - ref.cost_to_go
    loss = np.trace(gap @ ref.start_moment)
    if ref.noise_cov is not None:
        loss += ref.gamma / (1.0 - ref.gamma) * np.trace(gap @ ref.noise_cov)
    return float(loss)


def lq_error_split(learner: Any, ref: LQReference, half_width: float = LQ_BOX_HALF_WIDTH,
                   n_points: int = LQ_GRID_POINTS, n_actions: int = LQ_ACTION_POINTS,
                   action_half_width: float = LQ_ACTION_HALF_WIDTH) -> ErrorSplit:
    """RMS of Q - Q* over the states of :func:`lq_states` x controls ``u*(x) + d``, ``d`` on an even grid.

    Quadratic features of ``[x; u]`` span Q* exactly, so the approximation error is 0 in exact
    arithmetic; it is still computed (least squares of Q* on the learner's features over the same
    points, so it shows round-off only) and the remainder is sqrt(total^2 - approximation^2).
    """
    head = _quadratic_head(learner)
    require_positive("action grid half width", action_half_width)
    require_int("action grid points", n_actions, 2)
    _, x = lq_states(ref.A.shape[0], half_width, n_points)
    m = ref.B.shape[1]
    _, shifts = lq_states(1, action_half_width, n_actions)
    shifts = np.stack([g.ravel() for g in np.meshgrid(*[shifts[:, 0]] * m, indexing="ij")], axis=1)
    states = np.repeat(x, shifts.shape[0], axis=0)
    controls = ((-x @ ref.gain.T)[:, None, :] + shifts[None]).reshape(-1, m)
    q_star = ref.q_star(states, controls)
    total = _rms(learner.q(states, controls) - q_star)
    phi = head.q_features(states, controls)
    fit = phi @ np.linalg.lstsq(phi, q_star, rcond=None)[0]
    approx = _rms(fit - q_star)
    return ErrorSplit(total=total, approximation=approx, remainder=float(np.sqrt(max(total**2 - approx**2, 0.0))))
