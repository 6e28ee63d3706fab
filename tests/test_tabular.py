"""Tabular Q-learning: convergence to value iteration's Q*, the update rule, checkpoints, config checks."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from gymnasium import spaces
from hypothesis import given
from hypothesis import strategies as st
from small_mdp import GAMMA, N_ACTIONS, N_STATES, one_row_rule, random_mdp, state_space

from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.learners import build_learner
from qlab.learners.linear import LinearConfig, LinearQ, epsilon_greedy
from qlab.learners.protocol import Transitions
from qlab.learners.schedules import ScheduleConfig
from qlab.learners.tabular import TabularConfig, TabularQ
from qlab.reference import value_iteration


def sweep(P: np.ndarray, R: np.ndarray, rng: np.random.Generator) -> Transitions:
    """One sampled transition from every state-action pair (synchronous Q-learning)."""
    s = np.repeat(np.arange(N_STATES), N_ACTIONS)
    a = np.tile(np.arange(N_ACTIONS), N_STATES)
    next_s = (rng.random(s.size)[:, None] > P[a, s].cumsum(axis=1)).sum(axis=1)
    never = np.zeros(s.size, dtype=bool)
    return Transitions(
        obs=s[:, None].astype(np.float32),
        action=a,
        reward=R[s, a],
        next_obs=next_s[:, None].astype(np.float32),
        terminated=never,
        truncated=never,
    )


def all_states() -> np.ndarray:
    return np.arange(N_STATES, dtype=np.float32)[:, None]


def test_q_learning_converges_to_q_star():
    P, R = random_mdp(0)
    q_star = value_iteration(P, R, GAMMA)
    # polynomial steps 1/n^0.8 of the visit count converge fast at gamma = 0.5 (Even-Dar & Mansour 2003)
    config = TabularConfig(
        gamma=GAMMA,
        bins=[N_STATES],
        step_size=ScheduleConfig("polynomial", start=1.0, power=0.8),
        step_size_count="visits",
    )
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=1)
    rng = np.random.default_rng(2)
    for _ in range(2_000):  # 2e4 transitions
        learner.learn(sweep(P, R, rng))
    np.testing.assert_array_equal(learner.visits, 2_000)
    assert np.max(np.abs(learner.q_values(all_states()) - q_star)) < 0.05


@pytest.mark.parametrize("terminated", [True, False])
def test_bootstrap_through_truncation_not_termination(terminated):
    # Q-learning update (Watkins & Dayan 1992; Sutton & Barto 2018, eq. 6.8) with step 1 and Q = 2 everywhere:
    # Q(s, a) <- r after a termination, r + gamma * max_b Q(s', b) = r + 0.9 * 2 after a truncation
    config = TabularConfig(gamma=0.9, bins=[N_STATES], step_size=ScheduleConfig("constant", 1.0), initial_q=2.0)
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    learner.learn(Transitions.single([1.0], 0, 0.5, [3.0], terminated, not terminated))
    q = learner.q_values(all_states())
    assert q[1, 0] == pytest.approx(0.5 if terminated else 0.5 + 0.9 * 2.0)
    q[1, 0] = 2.0
    np.testing.assert_array_equal(q, 2.0)  # no other entry moved


def test_one_over_visit_count_steps_give_the_sample_mean():
    # incremental sample average (Sutton & Barto 2018, sec. 2.4): steps 1/n make Q the mean of the n targets
    config = TabularConfig(
        gamma=0.9,
        bins=[N_STATES],
        step_size=ScheduleConfig("polynomial", start=1.0, power=1.0),
        step_size_count="visits",
    )
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    rewards = np.random.default_rng(3).normal(size=25)
    for i, r in enumerate(rewards):
        learner.learn(Transitions.single([2.0], 1, r, [0.0], True, False))
        learner.learn(Transitions.single([4.0], 0, 10.0 * r, [0.0], i % 2 == 0, i % 2 == 1))  # other entries
    assert learner.q_values(all_states())[2, 1] == pytest.approx(np.mean(rewards), rel=1e-12)


def test_batch_averages_the_targets_of_a_repeated_pair():
    # a batch is one simultaneous update: an entry hit k times moves by its step times the mean of its k TD
    # errors, so with step 1 it lands on the mean target (minibatch averaging; common practice, no source)
    config = TabularConfig(bins=[N_STATES], step_size=ScheduleConfig("constant", 1.0))
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    obs = np.array([[3.0], [3.0], [3.0], [1.0]], dtype=np.float32)
    done = np.ones(4, dtype=bool)
    learner.learn(Transitions(obs, np.array([1, 1, 1, 1]), np.array([1.0, 2.0, 6.0, 5.0]), obs, done, ~done))
    q = learner.q_values(all_states())
    assert q[3, 1] == pytest.approx(3.0) and q[1, 1] == pytest.approx(5.0)
    np.testing.assert_array_equal(learner.visits[[3, 1], 1], [3, 1])


def test_epsilon_schedule_counts_act_calls():
    # epsilon-greedy (Sutton & Barto 2018, sec. 2.3): epsilon decays linearly to 0 over 50 act calls,
    # after which every act is greedy
    config = TabularConfig(bins=[N_STATES], epsilon=ScheduleConfig("linear", start=1.0, end=0.0, horizon=50.0))
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=4)
    learner.table[:] = np.random.default_rng(5).normal(size=learner.table.shape)
    obs = all_states()
    early = [learner.act(obs[i % N_STATES][None])[0] for i in range(50)]
    late = [learner.act(obs[i % N_STATES][None])[0] for i in range(50)]
    greedy = learner.greedy(obs)
    assert late == [greedy[i % N_STATES] for i in range(50)]
    assert early != [greedy[i % N_STATES] for i in range(50)]


@given(st.floats(0.0, 1.0), st.floats(0.0, 1.0), st.floats(1e-3, 1e8), st.integers(0, 10**9))
def test_linear_schedule_of_one_count_equals_numpys_array_result(start, end, horizon, n):
    # The one-count path (plain floats) must give numpy's numbers bit for bit: act on a batch of one
    # and the recorded epsilon use it, batches use the array path (IEEE 754 arithmetic in both)
    schedule = ScheduleConfig("linear", start, end, horizon).build("epsilon")
    assert schedule(n) == schedule(np.array([n]))[0] == schedule.over(n, 1)


def test_state_dict_round_trip_continues_identically(tmp_path):
    P, R = random_mdp(1)
    config = TabularConfig(
        gamma=0.9,
        bins=[N_STATES],
        epsilon=ScheduleConfig("linear", 1.0, 0.1, 300.0),
        step_size=ScheduleConfig("polynomial", 1.0, power=0.7),
        step_size_count="visits",
    )
    original = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=7)

    def run(learner: TabularQ, steps: int, seed: int) -> list[int]:
        rng, s, actions = np.random.default_rng(seed), 0, []
        for _ in range(steps):
            a = learner.act(np.array([[s]], dtype=np.float32))[0]
            s_next = int(rng.choice(N_STATES, p=P[a, s]))
            learner.learn(Transitions.single([s], a, R[s, a], [s_next], False, False))
            actions.append(a)
            s = s_next
        return actions

    run(original, 200, seed=8)
    saved = original.state_dict()
    save_checkpoint(tmp_path / "ck", {"learner": saved})
    continued = run(original, 300, seed=9)  # must not alter the state saved before
    for state in (saved, load_checkpoint(tmp_path / "ck")["learner"]):
        restored = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=99)
        restored.load_state_dict(state)
        assert run(restored, 300, seed=9) == continued
        np.testing.assert_array_equal(original.table, restored.table)
        np.testing.assert_array_equal(original.visits, restored.visits)


def test_built_from_plain_settings():
    settings = {"gamma": 0.5, "bins": [N_STATES], "epsilon": {"kind": "linear", "start": 1.0, "horizon": 10.0}}
    learner = build_learner("tabular", settings, state_space(), spaces.Discrete(N_ACTIONS), seed=0)
    assert isinstance(learner, TabularQ)
    assert learner.table.shape == (N_STATES, N_ACTIONS)
    assert learner.epsilon(10) == 0.0


@pytest.mark.parametrize(
    ("settings", "pattern"),
    [
        ({"step_size_count": "often"}, r"step_size_count must be one of \['step', 'visits'\]"),
        ({"gamma": 1.5}, r"gamma must lie in \[0, 1\]"),
        ({"epsilon": ScheduleConfig("cosine")}, r"epsilon: schedule kind must be one of \['constant'"),
        ({"epsilon": ScheduleConfig("constant", 1.5)}, r"epsilon.start and epsilon.end must lie in \[0, 1\]"),
        ({"step_size": ScheduleConfig("polynomial", power=2.0)}, r"step_size: polynomial schedule power"),
        ({"step_size": ScheduleConfig("constant", 0.0)}, "step_size.start must be > 0"),
        ({"bins": [0]}, "bins must be a non-empty list of integers >= 1"),
        ({"initial_q": float("nan")}, "initial_q must be finite"),
    ],
)
def test_bad_settings_raise(settings, pattern):
    with pytest.raises(ValueError, match=pattern):
        TabularConfig(**settings)


def test_bad_spaces_raise():
    with pytest.raises(ValueError, match="TabularQ needs a Discrete action space"):
        TabularQ(state_space(), spaces.Box(-1.0, 1.0, shape=(1,)), TabularConfig(), seed=0)
    with pytest.raises(ValueError, match="'low' and 'high'"):
        TabularQ(spaces.Box(-np.inf, np.inf, shape=(2,)), spaces.Discrete(2), TabularConfig(), seed=0)
    with pytest.raises(ValueError, match=r"bins must hold one value .* one per observation dimension \(1\)"):
        TabularQ(state_space(), spaces.Discrete(2), TabularConfig(bins=[3, 3]), seed=0)


def two_state_table() -> TabularQ:
    """Two states (observations 0 and 1), two actions, gamma 0.9, constant step 0.5, Q = [[1, 0], [2, 4]]."""
    config = TabularConfig(gamma=0.9, bins=[2], step_size=ScheduleConfig("constant", 0.5))
    learner = TabularQ(spaces.Box(-0.5, 1.5, shape=(1,), dtype=np.float32), spaces.Discrete(2), config, seed=0)
    learner.table[:] = [[1.0, 0.0], [2.0, 4.0]]
    return learner


def test_batch_update_on_two_states_by_hand():
    # Q-learning (Watkins 1989; Sutton & Barto 2018, eq. 6.8): Q(s,a) += alpha [r + gamma max_b Q(s',b) - Q(s,a)],
    # no bootstrap after a termination. A batch takes every TD error from the table before it and moves an
    # entry by alpha times the mean of its TD errors. By hand, alpha = 0.5, gamma = 0.9, Q = [[1, 0], [2, 4]]:
    #   (s=0, a=0, r=1,  s'=1, continues):  delta = 1 + 0.9 * 4 - 1 = 3.6
    #   (s=0, a=0, r=0,  s'=0, terminated): delta = 0 - 1 = -1
    #   (s=1, a=1, r=-1, s'=0, truncated):  delta = -1 + 0.9 * 1 - 4 = -4.1
    #   Q[0, 0] = 1 + 0.5 * (3.6 - 1) / 2 = 1.65;  Q[1, 1] = 4 + 0.5 * -4.1 = 1.95;  Q[0, 1], Q[1, 0] unchanged
    # (one at a time the same three would give Q[0, 0] = 1.4 and Q[1, 1] = 2.13)
    learner = two_state_table()
    obs = np.array([[0.0], [0.0], [1.0]], dtype=np.float32)
    next_obs = np.array([[1.0], [0.0], [0.0]], dtype=np.float32)
    batch = Transitions(obs, np.array([0, 0, 1]), np.array([1.0, 0.0, -1.0]), next_obs,
                        np.array([False, True, False]), np.array([False, False, True]))
    metrics = learner.learn(batch)
    np.testing.assert_allclose(learner.table, [[1.65, 0.0], [2.0, 1.95]], rtol=1e-14)
    np.testing.assert_array_equal(learner.visits, [[2, 0], [0, 1]])
    assert metrics["abs_td_error"] == pytest.approx((3.6 + 1.0 + 4.1) / 3, rel=1e-14)
    # a batch of one is the plain update: the first transition alone gives Q[0, 0] = 1 + 0.5 * 3.6 = 2.8
    single = two_state_table()
    single.learn(Transitions.single([0.0], 0, 1.0, [1.0], False, False))
    np.testing.assert_allclose(single.table, [[2.8, 0.0], [2.0, 4.0]], rtol=1e-14)


def test_act_on_one_observation_repeats_the_one_row_rule():
    config = TabularConfig(bins=[N_STATES], epsilon=ScheduleConfig("linear", start=1.0, end=0.1, horizon=60.0))
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=6)
    learner.table[:] = [[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [2.0, 2.0], [0.5, 0.0]]  # ties in states 0 and 3
    rng, schedule = np.random.default_rng(6), config.epsilon.build("epsilon")
    obs = all_states()
    for t in range(100):
        q = learner.q_values(obs[t % N_STATES][None])[0]
        assert learner.act(obs[t % N_STATES][None])[0] == one_row_rule(q, schedule(t), rng)
    assert learner.rng.bit_generator.state == rng.bit_generator.state


def test_act_on_a_batch_counts_every_row_and_breaks_ties_at_random():
    # epsilon falls linearly from 1 to 0 over 8 transitions: a first batch of 8 rows uses epsilon 1, 7/8, ...,
    # 1/8 (row j at count j) and advances the count by 8, so every row of the next batch is greedy
    config = TabularConfig(bins=[N_STATES], epsilon=ScheduleConfig("linear", start=1.0, end=0.0, horizon=8.0))
    learner = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=1)
    learner.table[:] = [[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [2.0, 2.0], [0.5, 0.0]]
    obs = np.tile(all_states(), (40, 1))  # 200 rows
    first = learner.act(obs[:8])
    assert first.shape == (8,) and first.dtype == np.int64 and learner.act_count == 8
    actions = learner.act(obs)
    assert learner.act_count == 208
    np.testing.assert_array_equal(actions[[1, 2, 4]], [0, 1, 0])  # unique maxima
    tied = actions.reshape(40, N_STATES)[:, [0, 3]]
    assert set(tied[:, 0]) == set(tied[:, 1]) == {0, 1}  # both tied actions chosen, 40 draws each


def test_exploring_and_tie_breaking_actions_are_uniform():
    # epsilon-greedy explores with a uniformly random action and breaks greedy ties uniformly (Sutton & Barto
    # 2018, sec. 2.3); the counts are checked against uniform frequencies with scipy.stats.chisquare
    q = np.array([[0.0, 2.0, 2.0, 1.0, 2.0]])
    rng = np.random.default_rng(0)
    explored = epsilon_greedy(np.repeat(q, 20_000, axis=0), 1.0, rng)
    greedy = epsilon_greedy(np.repeat(q, 20_000, axis=0), 0.0, rng)
    assert scipy.stats.chisquare(np.bincount(explored, minlength=5)).pvalue > 0.01
    assert set(np.unique(greedy)) == {1, 2, 4}
    assert scipy.stats.chisquare(np.bincount(greedy, minlength=5)[[1, 2, 4]]).pvalue > 0.01
    # with epsilon 0.25 a quarter of the rows explore: 3/4 + 1/4 * 3/5 of them pick a tied maximum
    mixed = epsilon_greedy(np.repeat(q, 20_000, axis=0), 0.25, rng)
    assert np.isin(mixed, [1, 2, 4]).mean() == pytest.approx(0.75 + 0.25 * 0.6, abs=0.01)


def test_table_update_equals_the_linear_learner_on_grid_cells():
    # a table is linear in one-hot cell features (Sutton & Barto 2018, sec. 9.3): TabularQ's update on cell
    # indices must give LinearQ's numbers on GridBins features with an unnormalised step, duplicates included
    config = TabularConfig(bins=[N_STATES], step_size=ScheduleConfig("polynomial", 1.0, power=0.8),
                           step_size_count="visits")
    table = TabularQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    linear = LinearQ(state_space(), spaces.Discrete(N_ACTIONS),
                     LinearConfig(features="grid", bins=[N_STATES], step_size=config.step_size,
                                  step_size_count="visits", normalise_step=False), seed=0)
    rng = np.random.default_rng(3)
    states = all_states()
    for _ in range(50):
        s, s2 = rng.integers(N_STATES, size=(2, 8))
        batch = Transitions(states[s], rng.integers(N_ACTIONS, size=8), rng.normal(size=8), states[s2],
                            rng.random(8) < 0.2, np.zeros(8, dtype=bool))
        assert table.learn(batch) == linear.learn(batch)
    np.testing.assert_array_equal(table.table, linear.weights)
    np.testing.assert_array_equal(table.visits, linear.visits)
