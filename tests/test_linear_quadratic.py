"""LinearQuadratic task: dynamics, reward, actions, noise, start states and parameter checks."""

from __future__ import annotations

import warnings

import gymnasium as gym
import numpy as np
import pytest
import scipy.signal
import scipy.stats
from gymnasium.utils.env_checker import check_env

import qlab  # noqa: F401  (registers the gymnasium ids)
from qlab.reference.lq import lq_solution
from qlab.tasks.batch import TaskBatch
from qlab.tasks.linear_quadratic import LinearQuadratic

# a 3-state, 2-input plant with coupled, non-diagonal costs (arbitrary test system)
A3 = np.array([[0.9, 0.2, 0.0], [-0.1, 1.0, 0.3], [0.05, 0.0, 0.8]])
B3 = np.array([[0.1, 0.0], [0.0, 0.2], [0.3, -0.1]])
Q3 = np.array([[2.0, 0.5, 0.0], [0.5, 1.0, 0.1], [0.0, 0.1, 0.5]])
R3 = np.array([[0.3, 0.1], [0.1, 0.2]])


def test_default_plant_is_zero_order_hold_double_integrator():
    # scipy.signal.cont2discrete (zero-order hold) of x'' = u, state (position, velocity)
    dt_s = 0.1
    Ac, Bc = np.array([[0.0, 1.0], [0.0, 0.0]]), np.array([[0.0], [1.0]])
    Ad, Bd, *_ = scipy.signal.cont2discrete((Ac, Bc, np.eye(2), np.zeros((2, 1))), dt_s, method="zoh")
    task = LinearQuadratic(dt_s=dt_s)
    np.testing.assert_allclose(task.A, Ad, rtol=1e-12)
    np.testing.assert_allclose(task.B, Bd, rtol=1e-12)
    np.testing.assert_array_equal(task.Q, np.eye(2))
    np.testing.assert_array_equal(task.R, [[0.1]])


def test_constant_acceleration_from_rest_follows_kinematics():
    # s = a t^2 / 2, v = a t under constant acceleration (handbook kinematics; exact under zero-order hold)
    dt_s, accel, steps = 0.05, 1.5, 40
    env = LinearQuadratic(dt_s=dt_s, control_bound=None)
    env.reset(seed=0)
    env.set_state(np.zeros(2))
    for _ in range(steps):
        env.step(np.array([accel], dtype=np.float32))
    t_s = steps * dt_s
    np.testing.assert_allclose(env.state, [0.5 * accel * t_s**2, accel * t_s], rtol=1e-12)


def test_steps_follow_the_matrix_recursion():
    # x[t+1] = A x[t] + B u[t], computed here one matrix-vector product at a time
    env = LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, control_bound=None, max_steps=50)
    env.reset(seed=1)
    x = env.state
    controls = np.random.default_rng(2).normal(size=(30, 2)).astype(np.float32)
    for u in controls:
        expected = A3 @ x + B3 @ u.astype(np.float64)
        obs, *_ = env.step(u)
        x = expected
        np.testing.assert_allclose(env.state, expected, rtol=1e-12, atol=1e-14)
        np.testing.assert_array_equal(obs, expected.astype(np.float32))


def test_reward_is_minus_quadratic_cost_of_state_before_the_step():
    # reward definition -(x'Qx + u'Ru) with x = x[t] (not x[t+1])
    env = LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, control_bound=None)
    env.reset(seed=0)
    x = np.array([0.4, -1.2, 2.0])
    env.set_state(x)
    u = np.array([0.5, -2.0])
    _, reward, terminated, truncated, info = env.step(u)
    assert reward == pytest.approx(-(x @ Q3 @ x + u @ R3 @ u), rel=1e-12)
    assert info["base_reward"] == reward
    assert not terminated and not truncated and not info["success"]


def test_clipping_applies_to_the_state_update_and_the_reward():
    x = np.array([0.3, -0.2])
    clipped = LinearQuadratic(control_bound=1.0)
    free = LinearQuadratic(control_bound=None)
    for env in (clipped, free):
        env.reset(seed=0)
        env.set_state(x)
    _, r_clip, *_ = clipped.step(np.array([5.0], dtype=np.float32))
    _, r_free, *_ = free.step(np.array([5.0], dtype=np.float32))
    A, B = clipped.A, clipped.B
    np.testing.assert_allclose(clipped.state, A @ x + B @ [1.0], rtol=1e-12)
    np.testing.assert_allclose(free.state, A @ x + B @ [5.0], rtol=1e-12)
    assert r_clip == pytest.approx(-(x @ x + 0.1 * 1.0**2), rel=1e-12)
    assert r_free == pytest.approx(-(x @ x + 0.1 * 5.0**2), rel=1e-12)
    assert np.all(np.isinf(free.action_space.high)) and np.all(np.isinf(free.action_space.low))
    np.testing.assert_array_equal(clipped.action_space.high, [1.0])


def test_per_dimension_control_bounds():
    task = LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, control_bound=[0.5, 2.0])
    np.testing.assert_array_equal(task.controls(np.array([[3.0, -3.0], [0.1, 1.0]])), [[0.5, -2.0], [0.1, 1.0]])


def test_discrete_levels_are_evenly_spaced_within_the_bound():
    task = LinearQuadratic(action_kind="discrete", n_levels=5, control_bound=4.0)
    assert task.action_space == gym.spaces.Discrete(5)
    np.testing.assert_array_equal(task.controls(np.arange(5)).ravel(), np.linspace(-4.0, 4.0, 5))
    three = LinearQuadratic(action_kind="discrete", n_levels=3, control_bound=2.0)
    np.testing.assert_array_equal(three.controls(np.array([0, 1, 2])).ravel(), [-2.0, 0.0, 2.0])


def test_batched_step_equals_single_steps():
    # N copies stepped together vs one at a time through the gymnasium interface (noise-free)
    n = 7
    batch = TaskBatch(LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, control_bound=1.0), n=n)
    batch.reset(None, np.arange(n))
    start = batch.state.copy()
    actions = np.random.default_rng(4).normal(scale=2.0, size=(n, 2)).astype(np.float32)
    out = batch.step(actions)
    for i in range(n):
        env = LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, control_bound=1.0)
        env.reset(seed=0)
        env.set_state(start[i])
        obs, reward, *_ = env.step(actions[i])
        np.testing.assert_array_equal(out.next_obs[i], obs)
        np.testing.assert_allclose(batch.state[i], env.state, rtol=1e-14, atol=1e-15)
        assert out.base_reward[i] == pytest.approx(reward, rel=1e-14)


def test_process_noise_has_the_requested_covariance():
    # sample mean and covariance of w = x' - A x - B u against N(0, W); tolerance 5 standard errors;
    # Var of a sample covariance entry = (W_ii W_jj + W_ij^2) / N for Gaussian data (Isserlis' theorem)
    W = np.array([[0.04, 0.01, 0.0], [0.01, 0.02, 0.0], [0.0, 0.0, 0.0]])  # singular on purpose
    task = LinearQuadratic(A=A3, B=B3, Q=Q3, R=R3, noise_cov=W)
    n = 20000
    rng = np.random.default_rng(5)
    x = rng.normal(size=(n, 3))
    u = rng.normal(size=(n, 2))
    w = task.batch_step(x, u, rng).next_state - x @ A3.T - u @ B3.T
    mean_se = np.sqrt(np.diag(W) / n)
    assert np.all(np.abs(w.mean(axis=0)) <= 5 * mean_se + 1e-15)
    cov_se = np.sqrt((np.outer(np.diag(W), np.diag(W)) + W**2) / n)
    assert np.all(np.abs(np.cov(w.T) - W) <= 5 * cov_se + 1e-15)


def test_never_terminates_and_truncates_at_the_time_cap():
    env = LinearQuadratic(max_steps=12)
    env.reset(seed=6)
    flags = [env.step(env.action_space.sample())[2:4] for _ in range(12)]
    assert [f[0] for f in flags] == [False] * 12
    assert [f[1] for f in flags] == [False] * 11 + [True]


def test_start_states_are_uniform_in_the_box():
    # Kolmogorov-Smirnov test against the uniform distribution (scipy.stats.kstest), per dimension
    low, high = np.array([-2.0, 0.5]), np.array([1.0, 0.75])
    task = LinearQuadratic(start_low=low, start_high=high)
    x = task.sample_start(4000, np.random.default_rng(7))
    assert np.all((x >= low) & (x <= high))
    for d in range(2):
        assert scipy.stats.kstest(x[:, d], scipy.stats.uniform(low[d], high[d] - low[d]).cdf).pvalue > 0.01


def test_default_bound_leaves_the_optimal_control_unclipped():
    # |K x[t]| along the optimal closed loop from the corners of the default start box (where |K x0| peaks)
    task = LinearQuadratic()
    corners = np.array([[-1.0, -1.0], [-1.0, 1.0], [1.0, -1.0], [1.0, 1.0]])
    for gamma in (0.5, 0.9, 0.99, 1.0):
        K, _ = lq_solution(task.A, task.B, task.Q, task.R, gamma)
        x, peak = corners, 0.0
        for _ in range(200):
            u = -x @ K.T
            peak = max(peak, float(np.abs(u).max()))
            x = x @ task.A.T + u @ task.B.T
        assert peak < 6.1 < task.control_high[0]


def test_goal_distance_and_potential():
    task = LinearQuadratic()
    obs = np.array([[3.0, 4.0], [0.0, 0.0]], dtype=np.float32)
    np.testing.assert_allclose(task.goal_distance(obs), [5.0, 0.0])  # 3-4-5 triangle
    np.testing.assert_allclose(task.potential(obs), [np.exp(-5.0), 1.0])


@pytest.mark.parametrize(
    "params",
    [{"control_bound": None}, {"noise_cov": np.diag([0.01, 0.02])}, {"action_kind": "discrete", "control_bound": 3.0}],
)
def test_gymnasium_env_checker_passes(params):
    # gymnasium.utils.env_checker.check_env; only the warnings about unbounded (infinite) or
    # non-normalised boxes are expected, anything else fails
    env = gym.make("qlab/LinearQuadratic-v0", **params).unwrapped
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.filterwarnings("ignore", message=".*infinity. This is probably too.*")
        warnings.filterwarnings("ignore", message=".*we recommend using a symmetric and normalized space.*")
        check_env(env, skip_render_check=True)
    obs, _ = env.reset(seed=0)
    assert obs.dtype == np.float32 and env.observation_space.contains(obs)


def test_seeded_reset_is_reproducible():
    a, b = LinearQuadratic(), LinearQuadratic()
    np.testing.assert_array_equal(a.reset(seed=11)[0], b.reset(seed=11)[0])


def test_shaping_other_than_none_is_rejected():
    with pytest.raises(ValueError, match="shaping"):
        gym.make("qlab/LinearQuadratic-v0", shaping="potential")


@pytest.mark.parametrize(
    ("params", "match"),
    [
        ({"A": [[1.0, 0.1, 0.0], [0.0, 1.0, 0.0]]}, "A must be a square"),
        ({"B": [[0.1], [0.2], [0.3]]}, "B must be an n x m matrix with n = 2"),
        ({"B": [0.005, 0.1]}, "B must be an n x m"),
        ({"Q": np.eye(3)}, "Q must be a finite 2 x 2"),
        ({"Q": [[1.0, 0.5], [0.0, 1.0]]}, "Q must be symmetric"),
        ({"Q": [[1.0, 0.0], [0.0, -0.1]]}, "Q must be symmetric positive semi-definite"),
        ({"R": [[0.0]]}, "R must be symmetric positive definite"),
        ({"R": np.eye(2)}, "R must be a finite 1 x 1"),
        ({"noise_cov": [[0.1, 0.0], [0.0, -0.1]]}, "W must be symmetric positive semi-definite"),
        ({"noise_cov": [0.1, 0.1]}, "W must be a finite 2 x 2"),
        ({"A": [[1.0, np.nan], [0.0, 1.0]]}, "A must be a finite"),
        ({"control_bound": 0.0}, "control_bound must be > 0"),
        ({"control_bound": [1.0, 2.0]}, "control_bound must be a finite number or a list of 1"),
        ({"control_bound": None, "action_kind": "discrete"}, "control_bound must be finite"),
        ({"action_kind": "discrete", "n_levels": 1}, "n_levels"),
        ({"action_kind": "bang-bang"}, "action_kind"),
        ({"start_low": 1.0, "start_high": -1.0}, "start_low must be <= start_high"),
        ({"start_low": [0.0, 0.0, 0.0]}, "start_low must be a finite number or a list of 2"),
        ({"dt_s": -0.1}, "dt_s"),
        ({"max_steps": 0}, "max_steps"),
    ],
)
def test_bad_parameters_raise_value_error(params, match):
    with pytest.raises(ValueError, match=match):
        LinearQuadratic(**params)
