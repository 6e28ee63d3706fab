"""Starting Q at a potential: Wiewiora's equivalence for a table, and least-squares starts of linear Q."""

from __future__ import annotations

import numpy as np
import pytest
from gymnasium import spaces

from qlab.learners.linear import LinearConfig, LinearQ, fit_points
from qlab.learners.protocol import Transitions
from qlab.learners.schedules import ScheduleConfig
from qlab.learners.tabular import TabularConfig, TabularQ
from qlab.tasks.dock import Dock

N_STATES, N_ACTIONS, GAMMA = 6, 3, 0.9
EPISODE_CAP = 7  # steps before a time-cap truncation


def state_space() -> spaces.Box:
    """1-D observation = state index; with ``bins = N_STATES`` every state is a cell centred on its index."""
    return spaces.Box(-0.5, N_STATES - 0.5, shape=(1,), dtype=np.float32)


def experience(seed: int, n: int) -> tuple[np.ndarray, ...]:
    """A fixed stream of ``n`` transitions of a seeded random MDP under uniformly random actions.

    From every state-action pair the next outcome is one of the states or termination (a flat
    Dirichlet over the ``N_STATES + 1`` outcomes); rewards are standard normal; an episode is
    truncated after ``EPISODE_CAP`` steps. Returns states, actions, rewards, next states,
    terminated and truncated flags.
    """
    rng = np.random.default_rng(seed)
    P = rng.dirichlet(np.ones(N_STATES + 1), size=(N_STATES, N_ACTIONS))
    R = rng.standard_normal((N_STATES, N_ACTIONS))
    out = {k: [] for k in ("s", "a", "r", "s2", "term", "trunc")}
    s, t = int(rng.integers(N_STATES)), 0
    for _ in range(n):
        a = int(rng.integers(N_ACTIONS))
        outcome = int(rng.choice(N_STATES + 1, p=P[s, a]))
        t += 1
        terminated = outcome == N_STATES
        truncated = not terminated and t >= EPISODE_CAP
        s2 = s if terminated else outcome  # after a termination s' is never bootstrapped
        for key, value in zip(out, (s, a, R[s, a], s2, terminated, truncated), strict=True):
            out[key].append(value)
        s, t = (int(rng.integers(N_STATES)), 0) if terminated or truncated else (s2, t)
    return tuple(np.array(v) for v in out.values())


@pytest.mark.parametrize("batch_size", [1, 4])
@pytest.mark.parametrize("step_size_count", ["visits", "step"])
def test_starting_at_phi_equals_potential_shaping_for_a_table(batch_size, step_size_count):
    # Wiewiora (2003), "Potential-based shaping and Q-value initialization are equivalent", JAIR 19,
    # sec. 3 (section number from memory): with the same experience, Q-learning on the base reward
    # started at Q0 + Phi keeps Q_B(s, a) = Q_A(s, a) + Phi(s), Q_A learning on the shaped reward
    # r + gamma Phi(s') - Phi(s) from Q0; Phi(s') = 0 after a termination (Ng, Harada & Russell 1999).
    s, a, r, s2, term, trunc = experience(seed=3, n=1_200)
    phi = np.random.default_rng(4).uniform(-1.0, 1.0, N_STATES)  # negative values too: any Phi works
    shaped = r + GAMMA * np.where(term, 0.0, phi[s2]) - phi[s]
    step = ScheduleConfig("polynomial", start=1.0, power=0.7)
    config = TabularConfig(bins=[N_STATES], gamma=GAMMA, step_size=step, step_size_count=step_size_count)
    shaped_learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    started_learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    started_learner.initialise_from(lambda obs: phi[np.rint(obs[:, 0]).astype(np.int64)])
    states = np.arange(N_STATES, dtype=np.float32)[:, None]
    np.testing.assert_array_equal(started_learner.q_values(states), np.repeat(phi[:, None], N_ACTIONS, axis=1))
    obs, next_obs = s[:, None].astype(np.float32), s2[:, None].astype(np.float32)
    for start in range(0, s.size, batch_size):
        part = slice(start, start + batch_size)
        shaped_learner.learn(Transitions(obs[part], a[part], shaped[part], next_obs[part], term[part], trunc[part]))
        started_learner.learn(Transitions(obs[part], a[part], r[part], next_obs[part], term[part], trunc[part]))
        q_shaped, q_started = shaped_learner.q_values(states), started_learner.q_values(states)
        np.testing.assert_allclose(q_started, q_shaped + phi[:, None], rtol=0.0, atol=1e-9)
        # Adding Phi(s) to a whole row keeps its argmax: the greedy policies agree (barring near-ties).
        top2 = np.sort(q_shaped, axis=1)[:, -2:]
        clear = top2[:, 1] - top2[:, 0] > 1e-9
        np.testing.assert_array_equal(started_learner.greedy(states)[clear], shaped_learner.greedy(states)[clear])
    assert np.all(started_learner.visits.sum(axis=1) > 0)  # every state was learned from
    assert np.abs(q_shaped).max() > 0.5  # Q moved well away from its start


def test_table_starts_at_the_value_of_each_cell_centre():
    # A table holds one value per cell: after the start, Q(obs, a) = values(centre of obs's cell).
    task = Dock()
    learner = TabularQ(task.observation_space, task.action_space, TabularConfig(bins=[12, 7]), seed=0)
    learner.initialise_from(task.potential)
    rng = np.random.default_rng(0)
    obs = (task.state_low + rng.random((500, 2)) * (task.state_high - task.state_low)).astype(np.float32)
    cells = learner.features.index(obs)
    expected = task.potential(learner.cell_centres()[cells])
    np.testing.assert_array_equal(learner.q_values(obs), np.repeat(expected[:, None], task.action_space.n, axis=1))
    assert np.all(learner.visits == 0) and learner.learn_count == 0


def box_points(task: Dock, n: int, seed: int) -> np.ndarray:
    """``n`` uniform points of the observation box plus its four corners (edges have tiles of their own)."""
    rng = np.random.default_rng(seed)
    inside = task.state_low + rng.random((n, 2)) * (task.state_high - task.state_low)
    corners = np.stack(np.meshgrid(*np.stack([task.state_low, task.state_high], axis=1)), axis=-1).reshape(-1, 2)
    return np.vstack([inside, corners]).astype(np.float32)


@pytest.mark.parametrize(
    "settings",
    [
        {"features": "tiles", "bins": [5], "n_tilings": 4},
        {"features": "tiles", "bins": [4, 3], "n_tilings": 8, "tile_offsets": "uniform"},
        {"features": "rbf", "bins": [5, 4]},
        {"features": "quadratic"},
        {"features": "grid", "bins": [9, 5]},
    ],
)
def test_linear_start_reproduces_a_function_in_the_feature_span(settings):
    # Least squares fits any function inside the span of the design exactly (its residual is zero), and
    # the sample pins the weights down on the whole box: the start reproduces the function everywhere.
    task = Dock(start_distance_m=(6.0, 10.0), channel_margin_m=4.0)
    learner = LinearQ(task.observation_space, task.action_space, LinearConfig(**settings), seed=0)
    w = np.random.default_rng(1).normal(size=learner.features.n_features)

    def in_span(obs: np.ndarray) -> np.ndarray:
        return learner.features(obs) @ w

    learner.initialise_from(in_span)
    points = box_points(task, 2_000, seed=2)
    expected = in_span(points)
    scale = np.abs(expected).max()
    np.testing.assert_allclose(learner.q_values(points), np.repeat(expected[:, None], 5, axis=1), atol=1e-8 * scale)


def test_linear_start_of_a_function_outside_the_span_is_a_least_squares_fit():
    # x * v is no sum of per-tiling 2-D tile constants: the start is the orthogonal projection on the
    # sample, so its residual is orthogonal to every feature there (normal equations).
    task = Dock(start_distance_m=(6.0, 10.0), channel_margin_m=4.0)
    learner = LinearQ(task.observation_space, task.action_space, LinearConfig(features="tiles", bins=[4]), seed=0)

    def product(obs: np.ndarray) -> np.ndarray:
        return np.asarray(obs[:, 0], dtype=np.float64) * obs[:, 1]

    learner.initialise_from(product)
    points = fit_points(learner.features, learner.features.low, learner.features.high)
    residual = learner.q_values(points)[:, 0] - product(points)
    assert np.abs(residual).max() > 1e-3  # outside the span: approximate
    design = learner.features(points)
    assert np.abs(design.T @ residual).max() < 1e-9 * design.sum(axis=0).max() * np.abs(product(points)).max()


def test_start_needs_a_bounded_box_and_well_shaped_values():
    unbounded = spaces.Box(-np.inf, np.inf, shape=(2,), dtype=np.float32)
    learner = LinearQ(unbounded, spaces.Discrete(2), LinearConfig(features="quadratic"), seed=0)
    with pytest.raises(ValueError, match="bounded box"):
        learner.initialise_from(lambda obs: np.zeros(obs.shape[0]))
    table = TabularQ(state_space(), spaces.Discrete(2), TabularConfig(bins=[N_STATES]), seed=0)
    with pytest.raises(ValueError, match="values"):
        table.initialise_from(lambda obs: np.zeros((obs.shape[0], 2)))
    with pytest.raises(ValueError, match="values"):
        table.initialise_from(lambda obs: np.full(obs.shape[0], np.nan))
