"""Tabular Q-learning: convergence to value iteration's Q*, the update rule, checkpoints, config checks."""

from __future__ import annotations

import numpy as np
import pytest
from gymnasium import spaces
from small_mdp import GAMMA, N_ACTIONS, N_STATES, random_mdp, state_space

from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.learners import build_learner
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
    early = [learner.act(obs[i % N_STATES]) for i in range(50)]
    late = [learner.act(obs[i % N_STATES]) for i in range(50)]
    greedy = learner.greedy(obs)
    assert late == [greedy[i % N_STATES] for i in range(50)]
    assert early != [greedy[i % N_STATES] for i in range(50)]


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
            a = learner.act(np.array([s], dtype=np.float32))
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
