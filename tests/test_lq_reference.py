"""LQ reference: Riccati solution, Q-function matrices and the noise offset, checked independently."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from qlab.reference.lq import (
    cost_to_go_matrix,
    gain_q_matrix,
    lq_solution,
    noise_offset,
    quadratic_cost,
)
from qlab.tasks.linear_quadratic import LinearQuadratic, double_integrator


def _random_system(seed: int, n: int = 3, m: int = 2) -> tuple[np.ndarray, ...]:
    """A seeded random plant (possibly open-loop unstable) with positive definite costs."""
    rng = np.random.default_rng(seed)
    A = 0.7 * rng.normal(size=(n, n))
    B = rng.normal(size=(n, m))
    M, N = rng.normal(size=(n, n)), rng.normal(size=(m, m))
    return A, B, M @ M.T + 0.1 * np.eye(n), N @ N.T + 0.1 * np.eye(m)


def _double_integrator_system() -> tuple[np.ndarray, ...]:
    A, B = double_integrator(0.1)
    return A, B, np.eye(2), np.array([[0.1]])


SYSTEMS = {
    "double_integrator": _double_integrator_system(),
    "random_3x2_seed0": _random_system(0),
    "random_3x2_seed1": _random_system(1),
    "random_2x1_seed2": _random_system(2, n=2, m=1),
}


def _riccati_fixed_point(A, B, Q, R, gamma, max_iter=100_000):
    """Iterate P <- Q + g A'PA - g^2 A'PB (R + g B'PB)^-1 B'PA from P = 0 until it stops changing."""
    P = np.zeros_like(Q)
    for _ in range(max_iter):
        gain_term = gamma**2 * A.T @ P @ B @ np.linalg.solve(R + gamma * B.T @ P @ B, B.T @ P @ A)
        P_next = Q + gamma * A.T @ P @ A - gain_term
        if np.max(np.abs(P_next - P)) <= 1e-13 * max(1.0, np.max(np.abs(P_next))):
            return P_next
        P = P_next
    raise AssertionError("Riccati recursion did not converge")


def _h_from_p(A, B, Q, R, gamma, P):
    AB = np.hstack([A, B])
    return scipy.linalg.block_diag(Q, R) + gamma * AB.T @ P @ AB


@pytest.mark.parametrize("name", SYSTEMS)
@pytest.mark.parametrize("gamma", [0.9, 0.99, 1.0])
def test_h_matches_the_riccati_recursion_fixed_point(name, gamma):
    # Bertsekas, Dynamic Programming and Optimal Control, Vol. I, Sec. 4.1: the discrete-time Riccati
    # equation iterated from P = 0 converges to the steady-state P (section number from memory);
    # discounting enters as A -> sqrt(gamma) A, B -> sqrt(gamma) B. Optimal gain u = -K x with
    # K = (R + g B'PB)^-1 g B'PA (same source).
    A, B, Q, R = SYSTEMS[name]
    P = _riccati_fixed_point(A, B, Q, R, gamma)
    K, H = lq_solution(A, B, Q, R, gamma)
    np.testing.assert_allclose(cost_to_go_matrix(A, B, Q, R, gamma), P, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(H, _h_from_p(A, B, Q, R, gamma, P), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(K, np.linalg.solve(R + gamma * B.T @ P @ B, gamma * B.T @ P @ A), rtol=1e-7, atol=1e-10)


@pytest.mark.parametrize(
    ("a", "b", "q", "r", "gamma"),
    [(1.0, 0.1, 1.0, 0.1, 0.99), (1.2, 0.5, 2.0, 1.0, 0.9), (0.5, 1.0, 1.0, 3.0, 1.0), (-1.5, 0.2, 0.5, 0.05, 0.95)],
)
def test_scalar_plant_matches_the_quadratic_formula(a, b, q, r, gamma):
    # Scalar discounted Riccati equation p = q + g a^2 p - g^2 a^2 b^2 p^2 / (r + g b^2 p), multiplied out:
    # g b^2 p^2 + (r (1 - g a^2) - g q b^2) p - q r = 0; its positive root (quadratic formula).
    lin = r * (1 - gamma * a**2) - gamma * q * b**2
    p = (-lin + np.sqrt(lin**2 + 4 * gamma * b**2 * q * r)) / (2 * gamma * b**2)
    K, H = lq_solution([[a]], [[b]], [[q]], [[r]], gamma)
    assert cost_to_go_matrix([[a]], [[b]], [[q]], [[r]], gamma)[0, 0] == pytest.approx(p, rel=1e-10)
    assert K[0, 0] == pytest.approx(gamma * a * b * p / (r + gamma * b**2 * p), rel=1e-10)
    cross = gamma * a * b * p
    np.testing.assert_allclose(H, [[q + gamma * a * a * p, cross], [cross, r + gamma * b * b * p]], rtol=1e-10)


@pytest.mark.parametrize("name", SYSTEMS)
@pytest.mark.parametrize("gamma", [0.9, 1.0])
def test_lyapunov_evaluation_of_the_optimal_gain_gives_the_optimal_h(name, gamma):
    # scipy.linalg.solve_discrete_lyapunov: P_K = (Q + K'RK) + g (A - BK)' P_K (A - BK) for K = K*
    A, B, Q, R = SYSTEMS[name]
    K, H = lq_solution(A, B, Q, R, gamma)
    P_K = scipy.linalg.solve_discrete_lyapunov(np.sqrt(gamma) * (A - B @ K).T, Q + K.T @ R @ K)
    np.testing.assert_allclose(_h_from_p(A, B, Q, R, gamma, P_K), H, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(gain_q_matrix(A, B, Q, R, gamma, K), H, rtol=1e-8, atol=1e-10)


def _policy_evaluation_fixed_point(A, B, Q, R, gamma, K, max_iter=100_000):
    """Iterate P <- Q + K'RK + g (A - BK)' P (A - BK) from P = 0 (policy evaluation by successive approximation)."""
    L, cost = A - B @ K, Q + K.T @ R @ K
    P = np.zeros_like(Q)
    for _ in range(max_iter):
        P_next = cost + gamma * L.T @ P @ L
        if np.max(np.abs(P_next - P)) <= 1e-13 * max(1.0, np.max(np.abs(P_next))):
            return P_next
        P = P_next
    raise AssertionError("policy evaluation did not converge")


def _detuned_gain(name: str, gamma: float) -> np.ndarray:
    """The optimal gain scaled by 0.7: stabilising for these systems but not optimal."""
    A, B, Q, R = SYSTEMS[name]
    K = 0.7 * lq_solution(A, B, Q, R, gamma)[0]
    assert np.max(np.abs(np.linalg.eigvals(np.sqrt(gamma) * (A - B @ K)))) < 1
    return K


@pytest.mark.parametrize("name", SYSTEMS)
def test_fixed_gain_q_matrix_matches_policy_evaluation_and_is_never_better_than_optimal(name):
    # Bertsekas, DPOC Vol. I: policy evaluation as the fixed point of the policy's Bellman equation;
    # Q_K >= Q* for every policy (optimality), i.e. H_K - H* is positive semi-definite
    gamma = 0.95
    A, B, Q, R = SYSTEMS[name]
    K = _detuned_gain(name, gamma)
    H_K = gain_q_matrix(A, B, Q, R, gamma, K)
    P_K = _policy_evaluation_fixed_point(A, B, Q, R, gamma, K)
    np.testing.assert_allclose(H_K, _h_from_p(A, B, Q, R, gamma, P_K), rtol=1e-8, atol=1e-10)
    _, H = lq_solution(A, B, Q, R, gamma)
    assert np.linalg.eigvalsh(H_K - H)[0] >= -1e-9 * np.max(np.abs(H))
    assert np.max(np.abs(H_K - H)) > 1e-3 * np.max(np.abs(H))  # the detuned gain really is worse


def _rollout_cost(task: LinearQuadratic, x0: np.ndarray, u0: np.ndarray, K: np.ndarray, gamma: float,
                  steps: int, rng: np.random.Generator) -> np.ndarray:
    """Discounted cost of taking u0 first, then u = -K x, for each row of x0 (negated task rewards)."""
    x, u, cost = x0, u0, np.zeros(x0.shape[0])
    for t in range(steps):
        out = task.batch_step(x, task.controls(u), rng)
        cost -= gamma**t * out.base_reward
        x = out.next_state
        u = -x @ K.T
    return cost


def _value_matrix(H: np.ndarray, K: np.ndarray) -> np.ndarray:
    """P_K with V_K(x) = Q_K(x, -K x) = x' P_K x."""
    lift = np.vstack([np.eye(K.shape[1]), -K])
    return lift.T @ H @ lift


@pytest.mark.parametrize("name", SYSTEMS)
@pytest.mark.parametrize("policy", ["optimal", "detuned"])
def test_noise_free_rollout_cost_matches_the_q_function(name, policy):
    # Rollout of the task (deterministic without noise): the definition of the discounted cost-to-go,
    # sum_t g^t c(x_t, u_t), against [x0; u0]' H [x0; u0] for any first control u0, and x0' P x0 on-policy
    gamma, steps = 0.95, 800  # 0.95^800 ~ 1e-18: the tail is far below the tolerance
    A, B, Q, R = SYSTEMS[name]
    task = LinearQuadratic(A=A, B=B, Q=Q, R=R, control_bound=None)
    K, H = lq_solution(A, B, Q, R, gamma)
    P = cost_to_go_matrix(A, B, Q, R, gamma)
    if policy == "detuned":
        K = _detuned_gain(name, gamma)
        H = gain_q_matrix(A, B, Q, R, gamma, K)
        P = _value_matrix(H, K)
    rng = np.random.default_rng(8)
    x0 = rng.uniform(-1.0, 1.0, size=(6, A.shape[0]))
    u_any = rng.normal(size=(6, B.shape[1]))
    np.testing.assert_allclose(
        _rollout_cost(task, x0, u_any, K, gamma, steps, rng), quadratic_cost(H, x0, u_any), rtol=1e-9
    )
    on_policy = _rollout_cost(task, x0, -x0 @ K.T, K, gamma, steps, rng)
    np.testing.assert_allclose(on_policy, np.einsum("ni,ij,nj->n", x0, P, x0), rtol=1e-9)


@pytest.mark.parametrize("policy", ["optimal", "detuned"])
def test_noisy_rollout_mean_cost_adds_the_noise_offset(policy):
    # Monte Carlo mean of the discounted cost with process noise w ~ N(0, W) against
    # x0' P x0 + g / (1 - g) tr(P W) (certainty equivalence: Bertsekas, DPOC Vol. I, Sec. 4.1, from memory;
    # the constant c solves c = g (tr(PW) + c)); tolerance 4 standard errors of the mean
    gamma, steps, copies = 0.9, 300, 4000  # 0.9^300 ~ 2e-14
    name = "double_integrator"
    A, B, Q, R = SYSTEMS[name]
    W = np.array([[0.01, 0.002], [0.002, 0.04]])
    task = LinearQuadratic(A=A, B=B, Q=Q, R=R, noise_cov=W, control_bound=None)
    K, H = lq_solution(A, B, Q, R, gamma)
    if policy == "detuned":
        K = _detuned_gain(name, gamma)
        H = gain_q_matrix(A, B, Q, R, gamma, K)
    P = _value_matrix(H, K)
    x0 = np.array([0.8, -0.5])
    u0 = np.array([1.5])
    costs = _rollout_cost(task, np.tile(x0, (copies, 1)), np.tile(u0, (copies, 1)), K, gamma, steps,
                          np.random.default_rng(9))
    se = costs.std(ddof=1) / np.sqrt(copies)
    offset = noise_offset(P, W, gamma)
    assert offset > 10 * se  # the check can tell the offset from zero
    expected = quadratic_cost(H, x0[None], u0[None])[0] + offset
    assert abs(costs.mean() - expected) < 4 * se


def test_noise_offset_closed_form():
    # g / (1 - g) tr(P W) with P = I, W = diag(1, 2), g = 0.5: 1 * 3 = 3 (arithmetic)
    assert noise_offset(np.eye(2), np.diag([1.0, 2.0]), 0.5) == pytest.approx(3.0)


A_DI, B_DI, Q_DI, R_DI = SYSTEMS["double_integrator"]


@pytest.mark.parametrize(
    ("args", "match"),
    [
        ((np.ones((2, 3)), B_DI, Q_DI, R_DI, 0.9), "A must be a square"),
        ((A_DI, np.ones((3, 1)), Q_DI, R_DI, 0.9), "B must be an n x m matrix with n = 2"),
        ((A_DI, B_DI, np.eye(3), R_DI, 0.9), "Q must be a finite 2 x 2"),
        ((A_DI, B_DI, [[1.0, 1.0], [0.0, 1.0]], R_DI, 0.9), "Q must be symmetric"),
        ((A_DI, B_DI, -np.eye(2), R_DI, 0.9), "Q must be symmetric positive semi-definite"),
        ((A_DI, B_DI, Q_DI, [[-0.1]], 0.9), "R must be symmetric positive definite"),
        ((A_DI, B_DI, Q_DI, np.eye(2), 0.9), "R must be a finite 1 x 1"),
        ((A_DI, B_DI, Q_DI, R_DI, 0.0), "gamma must lie in"),
        ((A_DI, B_DI, Q_DI, R_DI, 1.5), "gamma must lie in"),
        ((A_DI, B_DI, Q_DI, R_DI, float("nan")), "gamma must lie in"),
        # unstable mode 2.0 that the input cannot reach: no stabilising solution at gamma = 1
        ((np.diag([2.0, 0.5]), [[0.0], [1.0]], Q_DI, R_DI, 1.0), "no stabilising Riccati solution"),
    ],
)
def test_lq_solution_rejects_bad_arguments(args, match):
    with pytest.raises(ValueError, match=match):
        lq_solution(*args)


def test_gain_q_matrix_rejects_bad_gains():
    with pytest.raises(ValueError, match="K must be a finite 1 x 2"):
        gain_q_matrix(A_DI, B_DI, Q_DI, R_DI, 0.9, np.ones((2, 1)))
    # K = 0 leaves the double integrator's eigenvalue 1: at gamma = 1 the closed loop is not stable
    with pytest.raises(ValueError, match="K must stabilise"):
        gain_q_matrix(A_DI, B_DI, Q_DI, R_DI, 1.0, np.zeros((1, 2)))


def test_noise_offset_and_quadratic_cost_reject_bad_arguments():
    with pytest.raises(ValueError, match="gamma must lie in \\(0, 1\\)"):
        noise_offset(np.eye(2), np.eye(2), 1.0)
    with pytest.raises(ValueError, match="W must be a finite 2 x 2"):
        noise_offset(np.eye(2), np.eye(3), 0.9)
    with pytest.raises(ValueError, match="P must be a square"):
        noise_offset(np.ones((2, 3)), np.eye(2), 0.9)
    with pytest.raises(ValueError, match="H must be"):
        quadratic_cost(np.eye(2), np.zeros((1, 2)), np.zeros((1, 1)))
