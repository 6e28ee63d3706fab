"""Grid model of Dock: stochastic matrices, refinement, shaping invariance, cache."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from qlab.reference import evaluate_policy, greedy_policy, value_iteration
from qlab.reference.dock_grid import DockGrid
from qlab.tasks.batch import TaskBatch
from qlab.tasks.dock import Dock

GAMMA = 0.99


def short_dock(**params) -> Dock:
    """A short channel (6-10 m out) so that small grids resolve the approach."""
    return Dock(start_distance_m=(6.0, 10.0), channel_margin_m=4.0, **params)


@pytest.fixture(scope="module")
def grid() -> DockGrid:
    return DockGrid(short_dock(), 45, 21)


def test_rows_of_every_transition_matrix_sum_to_one(grid):
    # Definition of a (row-)stochastic matrix: non-negative entries, each row sums to 1.
    assert len(grid.transitions) == grid.n_actions == 5
    for P in grid.transitions:
        assert P.shape == (grid.n_states, grid.n_states)
        assert P.data.min() >= 0.0
        np.testing.assert_allclose(P.sum(axis=1), 1.0, atol=1e-12)
        # The terminal nodes are absorbing.
        assert P[grid.success_index, grid.success_index] == 1.0
        assert P[grid.failure_index, grid.failure_index] == 1.0


@given(
    coeffs=st.tuples(*[st.floats(-5.0, 5.0)] * 4),
    fractions=st.lists(st.tuples(st.floats(0.0, 1.0), st.floats(0.0, 1.0)), min_size=1, max_size=20),
)
def test_interpolation_reproduces_bilinear_functions(grid, coeffs, fractions):
    # Bilinear interpolation is exact for f = a + b x + c v + d x v (handbook property of
    # tensor-product linear interpolation; Munos & Moore 2002 use these weights).
    a, b, c, d = coeffs
    lo, hi = grid.nodes[0], grid.nodes[-1]
    states = lo + np.array(fractions) * (hi - lo)
    x, v = grid.nodes[:, 0], grid.nodes[:, 1]
    values = np.concatenate([a + b * x + c * v + d * x * v, [0.0, 0.0]])
    expected = a + b * states[:, 0] + c * states[:, 1] + d * states[:, 0] * states[:, 1]
    np.testing.assert_allclose(grid.interpolate(values, states), expected, rtol=1e-9, atol=1e-9)


def test_terminal_outcomes_follow_the_task(grid):
    # The grid's terminal columns agree with the task's own batch_step at every node.
    task = grid.task
    for a, P in enumerate(grid.transitions):
        out = task.batch_step(grid.nodes, task.controls(np.full(grid.n_grid, a)), np.random.default_rng(0))
        np.testing.assert_array_equal(P[: grid.n_grid, grid.success_index].toarray().ravel(), out.success)
        failed = out.terminated & ~out.success
        np.testing.assert_array_equal(P[: grid.n_grid, grid.failure_index].toarray().ravel(), failed)
        np.testing.assert_array_equal(grid.rewards("none", GAMMA)[: grid.n_grid, a], out.base_reward)


def rollout_value(task: Dock, grid: DockGrid, Q: np.ndarray, n_starts: int = 100) -> float:
    """Discounted base return of the grid-greedy policy on the real task, averaged over start slices."""
    lo, hi = task.start_distance_m
    state = np.zeros((n_starts, 2))
    state[:, 0] = -(lo + (np.arange(n_starts) + 0.5) / n_starts * (hi - lo))
    value, live, rng = np.zeros(n_starts), np.ones(n_starts, dtype=bool), np.random.default_rng(0)
    for t in range(task.max_steps):
        action = np.argmax(grid.interpolate(Q, state), axis=1)
        out = task.batch_step(state, task.controls(action), rng)
        value += live * GAMMA**t * out.base_reward
        live &= ~out.terminated
        state = out.next_state
        if not live.any():
            break
    return float(value.mean())


def test_values_settle_as_the_grid_is_refined():
    # Munos & Moore (2002): values of the interpolated grid MDP converge as the grid is refined.
    task = short_dock()
    start_values, policy_values = [], []
    for n_position, n_velocity in [(23, 11), (45, 21), (89, 41), (177, 81)]:  # spacing halves each time
        grid = DockGrid(task, n_position, n_velocity)
        R = grid.rewards("none", GAMMA)
        Q = value_iteration(grid.transitions, R, GAMMA)
        V = Q.max(axis=1)
        # Sutton & Barto (2018), Sec. 3.6: a policy greedy with respect to Q* is optimal, V^greedy = V*.
        np.testing.assert_allclose(evaluate_policy(grid.transitions, R, GAMMA, greedy_policy(Q)), V, atol=1e-8)
        start_values.append(grid.start_weights() @ V)
        policy_values.append(rollout_value(task, grid, Q))
    grid_steps = np.abs(np.diff(start_values))
    policy_steps = np.abs(np.diff(policy_values))
    assert np.all(grid_steps[1:] < grid_steps[:-1]), start_values
    assert np.all(policy_steps[1:] < policy_steps[:-1]), policy_values
    # Both estimate V*(s0) of the task; on the finest grid they agree closely.
    assert abs(start_values[-1] - policy_values[-1]) < 0.01
    assert 0.5 < start_values[-1] < 1.0


def test_potential_shaping_gives_q_star_minus_phi(grid):
    # Ng, Harada & Russell (1999), Theorem 1: Q*_shaped(s, a) = Q*(s, a) - Phi(s), and the shaped
    # greedy policy is optimal for the unshaped task.
    R = grid.rewards("none", GAMMA)
    Q = value_iteration(grid.transitions, R, GAMMA, tol=1e-12)
    Q_shaped = value_iteration(grid.transitions, grid.rewards("potential", GAMMA), GAMMA, tol=1e-12)
    phi = grid.potentials()
    assert phi[grid.success_index] == phi[grid.failure_index] == 0.0
    assert np.ptp(phi[: grid.n_grid]) > 0.1  # a potential that actually varies
    np.testing.assert_allclose(Q_shaped, Q - phi[:, None], atol=1e-9)
    V_shaped_greedy = evaluate_policy(grid.transitions, R, GAMMA, greedy_policy(Q_shaped))
    np.testing.assert_allclose(V_shaped_greedy, Q.max(axis=1), atol=1e-8)


def test_progress_rewards_match_what_the_task_pays(grid):
    # The grid's progress reward is the bonus TaskBatch pays for the same (node, action) step.
    task = grid.task
    batch = TaskBatch(task, grid.n_grid, shaping="progress", gamma=GAMMA, progress_scale=0.05)
    batch.reset(None, np.arange(grid.n_grid))
    R = grid.rewards("progress", GAMMA, progress_scale=0.05)
    for a in range(grid.n_actions):
        batch.state = grid.nodes.copy()
        batch.done[:] = False
        batch.elapsed[:] = 0
        step = batch.step(np.full(grid.n_grid, a))
        np.testing.assert_allclose(R[: grid.n_grid, a], step.reward, atol=1e-12)
    assert R[: grid.n_grid].max() > 0.0


def test_start_weights_form_a_distribution_on_the_start_segment(grid):
    w = grid.start_weights()
    assert w.shape == (grid.n_states,) and w.min() >= 0.0
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    support = grid.nodes[w[: grid.n_grid] > 0]
    lo, hi = grid.task.start_distance_m
    spacing = grid.positions_m[1] - grid.positions_m[0]
    assert support[:, 0].min() >= -hi - spacing and support[:, 0].max() <= -lo + spacing
    # Expected interpolated position is the mean start position (linear functions are reproduced).
    values = np.concatenate([grid.nodes[:, 0], [0.0, 0.0]])
    assert w @ values == pytest.approx(-(lo + hi) / 2, abs=1e-9)


def test_cache_round_trip(tmp_path, monkeypatch):
    task = short_dock()
    built = DockGrid(task, 23, 11, cache=tmp_path)
    assert not built.loaded_from_cache and built.cache_path.exists()
    loaded = DockGrid(short_dock(), 23, 11, cache=tmp_path)
    assert loaded.loaded_from_cache
    for P_built, P_loaded in zip(built.transitions, loaded.transitions, strict=True):
        assert (P_built != P_loaded).nnz == 0
    for variant in ("none", "potential", "progress"):
        np.testing.assert_array_equal(built.rewards(variant, GAMMA), loaded.rewards(variant, GAMMA))
    # Other task parameters or another resolution get their own file.
    assert DockGrid(short_dock(contact_speed_m_s=0.3), 23, 11, cache=tmp_path).cache_path != built.cache_path
    assert DockGrid(task, 24, 11, cache=tmp_path).cache_path != built.cache_path
    # cache=True uses $QLAB_CACHE.
    monkeypatch.setenv("QLAB_CACHE", str(tmp_path / "env"))
    via_env = DockGrid(task, 23, 11, cache=True)
    assert via_env.cache_path.parent == tmp_path / "env" and via_env.cache_path.exists()


@pytest.mark.parametrize(
    ("task", "n_position", "n_velocity", "name"),
    [
        (Dock(action_kind="continuous"), 10, 10, "action_kind"),
        (Dock(velocity_noise_m_s=0.1), 10, 10, "velocity_noise_m_s"),
        (Dock(), 1, 10, "n_position"),
        (Dock(), 10, 2.5, "n_velocity"),
    ],
)
def test_bad_grid_arguments_raise_value_error(task, n_position, n_velocity, name):
    with pytest.raises(ValueError, match=name):
        DockGrid(task, n_position, n_velocity)


def test_bad_variant_and_gamma_raise_value_error(grid):
    with pytest.raises(ValueError, match="shaping"):
        grid.rewards("bonus", GAMMA)
    with pytest.raises(ValueError, match="gamma"):
        grid.rewards("potential", 1.5)
