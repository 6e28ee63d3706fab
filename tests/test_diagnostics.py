"""Q-function diagnostics on a small Dock grid (error split, policy loss, value maps) and on the LQ task
(gain and Q-matrix errors; maps, policy loss and error split against the closed form)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from qlab.compare.diagnostics import (
    approximation_error,
    best_fit,
    error_split,
    learned_q_on_grid,
    lq_diagnostics,
    lq_error_split,
    lq_policy_loss,
    lq_value_maps,
    policy_loss,
    value_maps,
)
from qlab.learners.linear import LinearConfig, LinearQ
from qlab.learners.lstdq import LSTDQ, LSTDQConfig
from qlab.learners.qnet import QNetConfig, QNetLearner
from qlab.learners.tabular import TabularConfig, TabularQ
from qlab.reference import lq_solution
from qlab.reference.dock_answers import grid_reference
from qlab.reference.lq import lq_reference, lq_states
from qlab.tasks.dock import Dock
from qlab.tasks.linear_quadratic import LinearQuadratic

GAMMA = 0.99
N_POSITION, N_VELOCITY = 33, 17


def short_dock() -> Dock:
    """A short channel (6-10 m out) so that a small grid resolves the approach."""
    return Dock(start_distance_m=(6.0, 10.0), channel_margin_m=4.0)


@pytest.fixture(scope="module")
def task() -> Dock:
    return short_dock()


@pytest.fixture(scope="module")
def ref(task):
    return grid_reference(task, GAMMA, "none", N_POSITION, N_VELOCITY)


@pytest.fixture(scope="module")
def ref_potential(task):
    return grid_reference(task, GAMMA, "potential", N_POSITION, N_VELOCITY)


class NodeTable:
    """Stub learner honouring ``q_values`` only: Q of the grid node nearest each observation."""

    def __init__(self, ref, q: np.ndarray):
        self.grid, self.q = ref.grid, q

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        g = self.grid
        i = np.rint((obs[:, 0] - g.positions_m[0]) / (g.positions_m[1] - g.positions_m[0])).astype(np.int64)
        j = np.rint((obs[:, 1] - g.velocities_m_s[0]) / (g.velocities_m_s[1] - g.velocities_m_s[0])).astype(np.int64)
        return self.q[g.node_index(i, j)]


def rms(x: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(x))))


# ------------------------------------------------------------------------------------------------ error split


def test_table_at_the_projection_of_q_star_has_no_remainder(task, ref):
    learner = TabularQ(task.observation_space, task.action_space, TabularConfig(bins=[8, 6], gamma=GAMMA), seed=0)
    # Least squares on one-hot cell features has the normal equations diag(counts) w = per-cell sums:
    # the fit is the per-cell mean of Q* (Sutton & Barto 2018, sec. 9.3: a table is one-hot linear).
    cells = learner.features.index(ref.observations)
    counts = np.bincount(cells, minlength=learner.features.n_features)
    assert counts.min() >= 2  # every cell holds several nodes: a real average
    for a in range(task.action_space.n):
        learner.table[:, a] = np.bincount(cells, weights=ref.q_star[:, a], minlength=counts.size) / counts
    np.testing.assert_allclose(best_fit(learner, ref), learner.table[cells], rtol=1e-10, atol=1e-12)
    split = error_split(learner, ref)
    assert split.total > 1e-3  # the table is coarser than the grid: a real approximation error
    assert split.approximation == pytest.approx(split.total, rel=1e-9)
    assert split.remainder < 1e-4 * split.total  # sqrt of a difference of nearly equal squares


@pytest.mark.parametrize("features", ["tiles", "rbf"])
def test_squared_errors_add_for_a_linear_learner(task, ref, features):
    config = LinearConfig(features=features, bins=[5], n_tilings=4, gamma=GAMMA)
    learner = LinearQ(task.observation_space, task.action_space, config, seed=0)
    learner.weights[:] = np.random.default_rng(1).normal(0.0, 0.3, learner.weights.shape)
    fit = best_fit(learner, ref)
    # Orthogonal projection onto span(features at the nodes): the residual Q* - fit is orthogonal to
    # every feature (normal equations), hence, by Pythagoras, |Q - Q*|^2 = |Q* - fit|^2 + |Q - fit|^2
    # for any Q in the span.
    design = learner.features(ref.observations)
    residual = ref.q_star - fit
    assert np.max(np.abs(design.T @ residual)) < 1e-9 * np.abs(design).sum(axis=0).max() * np.abs(ref.q_star).max()
    split = error_split(learner, ref)
    q = learned_q_on_grid(learner, ref)
    assert split.total == pytest.approx(rms(q - ref.q_star), rel=1e-12)
    assert split.approximation == pytest.approx(rms(residual), rel=1e-12)
    assert split.remainder == pytest.approx(rms(q - fit), rel=1e-8)
    assert split.approximation > 1e-3 and split.remainder > 1e-3  # both parts present


def test_approximation_error_ignores_the_weights(task, ref):
    # The best fit uses the function class, not the learned weights.
    config = LinearConfig(features="tiles", bins=[5], n_tilings=4, gamma=GAMMA)
    a = LinearQ(task.observation_space, task.action_space, config, seed=0)
    b = LinearQ(task.observation_space, task.action_space, config, seed=1)
    b.weights[:] = 5.0
    assert approximation_error(a, ref) == approximation_error(b, ref)
    reused = error_split(b, ref, approximation=approximation_error(a, ref))
    assert reused == error_split(b, ref)


def test_network_fit_is_seeded_and_beats_a_constant(task):
    small = grid_reference(task, GAMMA, "none", 17, 9)
    config = QNetConfig(hidden_sizes=[16, 16], gamma=GAMMA)
    one = QNetLearner(task.observation_space, task.action_space, config, seed=0)
    other = QNetLearner(task.observation_space, task.action_space, config, seed=7)
    first = approximation_error(one, small, network_steps=300)
    assert first == approximation_error(other, small, network_steps=300)  # learner's seed and weights unused
    # A trained network with output biases should do better than the best constant per action
    # (common practice, no source).
    assert first < rms(small.q_star - small.q_star.mean(axis=0))
    split = error_split(one, small, approximation=first)
    assert split.remainder is None and split.approximation == first
    assert split.total == pytest.approx(rms(learned_q_on_grid(one, small) - small.q_star), rel=1e-12)


def test_error_split_names_the_missing_capability(ref):
    # NodeTable answers q_values only: no fit_function_class, so no best fit and no split
    with pytest.raises(ValueError, match=r"learner must offer fit_function_class.* got NodeTable"):
        error_split(NodeTable(ref, ref.q_star), ref)


class FittedNodeTable(NodeTable):
    """NodeTable with the fit capability of a one-hot table on the grid nodes (Q* itself is in its class)."""

    def __init__(self, ref, q: np.ndarray, linear: bool):
        super().__init__(ref, q)
        if linear:
            self.linear_features = object()  # only its presence is read by the error split

    def fit_function_class(self, observations, targets, steps=None):
        return np.asarray(targets)


@pytest.mark.parametrize("linear", [True, False])
def test_error_split_follows_the_capabilities_not_the_class(ref, linear):
    q = ref.q_star + 0.1
    split = error_split(FittedNodeTable(ref, q, linear), ref)
    assert split.approximation == 0.0 and split.total == pytest.approx(0.1, rel=1e-9)
    assert split.remainder == (pytest.approx(0.1, rel=1e-9) if linear else None)


# ------------------------------------------------------------------------------------- policy loss, value maps


def test_policy_loss_of_q_star_is_zero_and_of_random_q_positive(ref, ref_potential):
    # Sutton & Barto (2018), sec. 3.6: a policy greedy for Q* is optimal.
    assert abs(policy_loss(NodeTable(ref, ref.q_star), ref)) < 1e-9
    # Ng, Harada & Russell (1999), Theorem 1: greedy for the potential-shaped Q* is optimal on the base reward.
    assert abs(policy_loss(NodeTable(ref_potential, ref_potential.q_star), ref_potential)) < 1e-9
    noise = np.random.default_rng(0).random(ref.q_star.shape)
    loss = policy_loss(NodeTable(ref, noise), ref)
    # Rewards are 0 or 1, so V^pi >= 0 and the loss is at most V*(s0).
    assert 0.0 < loss <= ref.optimal_start_value + 1e-12


def test_value_maps_have_the_grid_shape(ref):
    shape = (N_POSITION, N_VELOCITY)
    exact = value_maps(NodeTable(ref, ref.q_star), ref)
    assert exact.learned_v.shape == exact.optimal_v.shape == exact.disagreement.shape == shape
    assert exact.positions_m.shape == (N_POSITION,) and exact.velocities_m_s.shape == (N_VELOCITY,)
    np.testing.assert_array_equal(exact.learned_v, exact.optimal_v)
    assert not exact.disagreement.any()
    noise = np.random.default_rng(0).random(ref.q_star.shape)
    rough = value_maps(NodeTable(ref, noise), ref)
    np.testing.assert_array_equal(rough.learned_v[3, 5], noise[ref.grid.node_index(3, 5)].max())
    assert rough.disagreement.any() and not rough.disagreement.all()


def test_learned_q_on_grid_checks_the_shape(ref):
    with pytest.raises(ValueError, match="q_values"):
        learned_q_on_grid(NodeTable(ref, ref.q_star[:, :2]), ref)


# ------------------------------------------------------------------------------------------------ LQ


def lq_learner(lq: LinearQuadratic, gamma: float) -> LSTDQ:
    return LSTDQ(lq.observation_space, lq.action_space, LSTDQConfig(features="quadratic", gamma=gamma), seed=0)


def test_lq_diagnostics_of_the_exact_q_function_are_zero():
    lq, gamma = LinearQuadratic(), 0.95
    _, H_star = lq_solution(lq.A, lq.B, lq.Q, lq.R, gamma)  # scipy.linalg.solve_discrete_are inside
    learner = lq_learner(lq, gamma)
    learner.head.weights[:] = learner.head.quad.from_matrix(-H_star)  # reward form: Q = -z'H*z
    assert learner.head.improve()
    result = lq_diagnostics(learner, lq.A, lq.B, lq.Q, lq.R, gamma)
    assert result.gain_error < 1e-10 and result.q_matrix_error < 1e-12
    assert result.cost_ratio == pytest.approx(1.0, abs=1e-10)


def test_lq_diagnostics_of_a_perturbed_q_function():
    lq, gamma = LinearQuadratic(), 0.95
    K_star, H_star = lq_solution(lq.A, lq.B, lq.Q, lq.R, gamma)
    learner = lq_learner(lq, gamma)
    H = H_star.copy()
    H[2, :2] *= 1.3
    H[:2, 2] *= 1.3
    learner.head.weights[:] = learner.head.quad.from_matrix(-H)
    assert learner.head.improve()
    result = lq_diagnostics(learner, lq.A, lq.B, lq.Q, lq.R, gamma)
    np.testing.assert_allclose(learner.head.gain, 1.3 * K_star, rtol=1e-12)  # K = H_uu^-1 H_ux
    assert result.gain_error == pytest.approx(0.3, rel=1e-9)
    assert result.q_matrix_error == pytest.approx(np.linalg.norm(H - H_star) / np.linalg.norm(H_star), rel=1e-9)
    # The Riccati gain minimises the cost from every state: P_K >= P* for every stabilising K
    # (Bertsekas 2017, Dynamic Programming and Optimal Control I, sec. 3.1; from memory).
    assert result.cost_ratio > 1.0


def test_lq_diagnostics_need_a_quadratic_head(task):
    learner = TabularQ(task.observation_space, task.action_space, TabularConfig(bins=[4]), seed=0)
    with pytest.raises(ValueError, match=r"learner must offer a quadratic_head.* got TabularQ without one"):
        lq_diagnostics(learner, np.eye(2), np.ones((2, 1)), np.eye(2), np.eye(1), 0.9)
    lq = lq_task(None)
    discrete = LSTDQ(task.observation_space, task.action_space, LSTDQConfig(features="tiles", bins=[4]), seed=0)
    assert discrete.quadratic_head is None and discrete.linear_features is not None
    for check in (lq_policy_loss, lq_value_maps, lq_error_split):
        with pytest.raises(ValueError, match="quadratic_head"):
            check(discrete, lq_reference(lq, GAMMA_LQ))
    continuous = lq_learner(lq, GAMMA_LQ)
    assert continuous.quadratic_head is continuous.head and continuous.linear_features is None
    with pytest.raises(ValueError, match="finite action set"):
        continuous.fit_function_class(np.zeros((3, 2)), np.zeros((3, 1)))


def riccati(lq: LinearQuadratic, gamma: float) -> tuple[np.ndarray, np.ndarray]:
    """P* and H* of the discounted LQ problem, straight from scipy (not through qlab.reference)."""
    root = np.sqrt(gamma)
    # scipy.linalg.solve_discrete_are; discounting as the undiscounted problem of (sqrt(gamma) A, sqrt(gamma) B)
    # (Bertsekas 2017, Dynamic Programming and Optimal Control I, sec. 3.1; from memory)
    P = scipy.linalg.solve_discrete_are(root * lq.A, root * lq.B, lq.Q, lq.R)
    AB = np.hstack([lq.A, lq.B])
    H = scipy.linalg.block_diag(lq.Q, lq.R) + gamma * AB.T @ P @ AB  # Q*(x, u) = c(x, u) + gamma V*(Ax + Bu)
    return P, H


def start_moment(lq: LinearQuadratic) -> np.ndarray:
    """E[x0 x0'] for x0 uniform in the start box by 2-point Gauss-Legendre quadrature per axis.

    numpy.polynomial.legendre.leggauss: n points integrate polynomials of degree <= 2n - 1 exactly.
    """
    nodes, weights = np.polynomial.legendre.leggauss(2)
    mid, half = 0.5 * (lq.start_high + lq.start_low), 0.5 * (lq.start_high - lq.start_low)
    points = np.stack(np.meshgrid(*[nodes] * mid.size, indexing="ij"), axis=-1).reshape(-1, mid.size)
    w = np.prod(np.stack(np.meshgrid(*[weights] * mid.size, indexing="ij"), axis=-1).reshape(-1, mid.size), axis=1)
    x = mid + half * points
    return np.einsum("k,ki,kj->ij", w / w.sum(), x, x)


NOISE = {"noise-free": None, "noisy": [[0.02, 0.005], [0.005, 0.01]]}
GAMMA_LQ = 0.95


def lq_task(noise) -> LinearQuadratic:
    """The default double integrator with an off-centre start box (so the start mean matters)."""
    return LinearQuadratic(noise_cov=noise, start_low=[-1.0, 0.0], start_high=[2.0, 0.5])


def exact_lq_learner(lq: LinearQuadratic, gamma: float) -> LSTDQ:
    """An LSTD-Q learner whose quadratic form is Q* (the noise constant included)."""
    P, H = riccati(lq, gamma)
    constant = 0.0 if lq.noise_cov is None else gamma / (1 - gamma) * np.trace(P @ lq.noise_cov)
    learner = lq_learner(lq, gamma)
    learner.head.weights[:] = learner.head.quad.from_matrix(-H, c=-constant)
    assert learner.head.improve()
    return learner


@pytest.mark.parametrize("noise", NOISE.values(), ids=NOISE.keys())
def test_lq_maps_loss_and_split_of_the_exact_q_function(noise):
    lq = lq_task(noise)
    P, _ = riccati(lq, GAMMA_LQ)
    learner = exact_lq_learner(lq, GAMMA_LQ)
    ref = lq_reference(lq, GAMMA_LQ)
    maps = lq_value_maps(learner, ref, half_width=3.0, n_points=11)
    x1, x2 = np.meshgrid(np.linspace(-3, 3, 11), np.linspace(-3, 3, 11), indexing="ij")
    x = np.stack([x1.ravel(), x2.ravel()], axis=1)
    # noise adds gamma / (1 - gamma) tr(P W) to the cost (Bertsekas 2017, sec. 3.1; from memory)
    constant = 0.0 if noise is None else GAMMA_LQ / (1 - GAMMA_LQ) * np.trace(P @ np.asarray(noise))
    v_star = -np.einsum("ni,ij,nj->n", x, P, x) - constant
    np.testing.assert_allclose(maps.optimal_v.ravel(), v_star, rtol=1e-10)
    np.testing.assert_allclose(maps.learned_v, maps.optimal_v, rtol=1e-10, atol=1e-10)
    assert maps.action_distance.max() < 1e-10
    assert lq_policy_loss(learner, ref) == pytest.approx(0.0, abs=1e-10)
    split = lq_error_split(learner, ref, n_points=7, n_actions=3)
    scale = np.abs(v_star).max()
    assert split.total < 1e-10 * scale and split.approximation < 1e-10 * scale


@pytest.mark.parametrize("noise", NOISE.values(), ids=NOISE.keys())
def test_lq_policy_loss_of_a_perturbed_gain_is_the_lyapunov_gap(noise):
    lq = lq_task(noise)
    P, _ = riccati(lq, GAMMA_LQ)
    learner = exact_lq_learner(lq, GAMMA_LQ)
    K = learner.head.gain * np.array([[1.3, 0.8]])
    learner.head.gain = K
    closed = np.sqrt(GAMMA_LQ) * (lq.A - lq.B @ K)
    # scipy.linalg.solve_discrete_lyapunov: P_K = Q + K'RK + gamma (A - BK)' P_K (A - BK)
    P_K = scipy.linalg.solve_discrete_lyapunov(closed.T, lq.Q + K.T @ lq.R @ K)
    expected = np.trace((P_K - P) @ start_moment(lq))
    if noise is not None:
        expected += GAMMA_LQ / (1 - GAMMA_LQ) * np.trace((P_K - P) @ np.asarray(noise))
    loss = lq_policy_loss(learner, lq_reference(lq, GAMMA_LQ))
    assert loss > 0 and loss == pytest.approx(expected, rel=1e-9)


def test_lq_policy_loss_of_an_unstable_gain_is_infinite():
    lq = lq_task(None)
    learner = exact_lq_learner(lq, GAMMA_LQ)
    learner.head.gain = -learner.head.gain
    radius = np.abs(np.linalg.eigvals(np.sqrt(GAMMA_LQ) * (lq.A - lq.B @ learner.head.gain))).max()
    assert radius >= 1.0  # numpy.linalg.eigvals: the discounted closed loop diverges
    assert lq_policy_loss(learner, lq_reference(lq, GAMMA_LQ)) == np.inf


def test_lq_error_split_of_a_perturbed_q_function():
    lq = lq_task(None)
    _, H = riccati(lq, GAMMA_LQ)
    K_star = np.linalg.solve(H[2:, 2:], H[2:, :2])  # u* = -H_uu^-1 H_ux x
    learner = lq_learner(lq, GAMMA_LQ)
    delta = np.array([[0.5, 0.1, 0.0], [0.1, -0.2, 0.3], [0.0, 0.3, 0.4]])
    learner.head.weights[:] = learner.head.quad.from_matrix(-(H + delta))
    split = lq_error_split(learner, lq_reference(lq, GAMMA_LQ), half_width=2.0, n_points=5, n_actions=3,
                           action_half_width=1.0)
    points = [(x1, x2, -K_star[0] @ [x1, x2] + d) for x1 in np.linspace(-2, 2, 5) for x2 in np.linspace(-2, 2, 5)
              for d in (-1.0, 0.0, 1.0)]
    z = np.array(points)
    total = np.sqrt(np.mean(np.einsum("ni,ij,nj->n", z, delta, z) ** 2))  # Q - Q* = -z' delta z
    assert split.total == pytest.approx(total, rel=1e-9)
    assert split.approximation < 1e-10 * np.abs(np.einsum("ni,ij,nj->n", z, H, z)).max()
    assert split.remainder == pytest.approx(total, rel=1e-9)


def test_lq_states_and_maps_need_two_state_dimensions():
    axis, states = lq_states(3, 1.0, 41)
    assert axis.size == round(41 ** (2 / 3)) and states.shape == (axis.size**3, 3)
    lq = LinearQuadratic(A=np.eye(3), B=np.ones((3, 1)))
    learner = lq_learner(lq, GAMMA_LQ)
    with pytest.raises(ValueError, match="2-D state"):
        lq_value_maps(learner, lq_reference(lq, GAMMA_LQ))
    with pytest.raises(ValueError, match="half width"):
        lq_states(2, 0.0, 5)
