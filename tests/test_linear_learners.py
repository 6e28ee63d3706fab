"""Semi-gradient linear Q and LSTD-Q policy iteration against exact answers (value iteration, LQ Riccati)."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from small_mdp import GAMMA, N_ACTIONS, N_STATES, one_row_rule, random_mdp, state_space

import qlab  # noqa: F401  (registers the qlab/ gymnasium ids)
from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.learners import build_learner
from qlab.learners.linear import LinearConfig, LinearQ
from qlab.learners.lstdq import LSTDQ, LSTDQConfig
from qlab.learners.protocol import Transitions
from qlab.learners.schedules import ScheduleConfig
from qlab.reference import lq_solution, value_iteration


def sweeps(P: np.ndarray, R: np.ndarray, rng: np.random.Generator, rounds: int) -> Transitions:
    """``rounds`` sampled transitions from every state-action pair, in one batch."""
    s = np.tile(np.repeat(np.arange(N_STATES), N_ACTIONS), rounds)
    a = np.tile(np.arange(N_ACTIONS), N_STATES * rounds)
    next_s = (rng.random(s.size)[:, None] > P[a, s].cumsum(axis=1)).sum(axis=1)
    never = np.zeros(s.size, dtype=bool)
    return Transitions(s[:, None].astype(np.float32), a, R[s, a], next_s[:, None].astype(np.float32), never, never)


def all_states() -> np.ndarray:
    return np.arange(N_STATES, dtype=np.float32)[:, None]


def one_hot_config(**settings) -> LinearConfig:
    return LinearConfig(features="grid", bins=[N_STATES], gamma=GAMMA, **settings)


# ------------------------------------------------------------------------------------ semi-gradient linear Q


def test_linear_q_with_one_hot_features_reaches_q_star():
    # a linear learner on a complete one-hot basis is tabular (Sutton & Barto 2018, sec. 9.3); polynomial
    # steps 1/n^0.8 of the visit count (Even-Dar & Mansour 2003)
    P, R = random_mdp(0)
    q_star = value_iteration(P, R, GAMMA)
    config = one_hot_config(step_size=ScheduleConfig("polynomial", start=1.0, power=0.8), step_size_count="visits")
    learner = LinearQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=1)
    rng = np.random.default_rng(2)
    for _ in range(2_000):
        learner.learn(sweeps(P, R, rng, 1))
    assert np.max(np.abs(learner.q_values(all_states()) - q_star)) < 0.05


@pytest.mark.parametrize("offsets", ["uniform", "asymmetric"])
def test_normalised_step_one_learns_in_one_trial_with_tiles(offsets):
    # Sutton & Barto (2018), sec. 9.5.4: with alpha = 1/n for n tilings, one update moves the estimate at the
    # trained state all the way to the target (normalised step 1 = 1/n per tile weight)
    space = spaces.Box(-1.0, 1.0, shape=(2,), dtype=np.float32)
    config = LinearConfig(
        features="tiles",
        bins=[4],
        n_tilings=8,
        tile_offsets=offsets,
        gamma=0.9,
        step_size=ScheduleConfig("constant", 1.0),
    )
    learner = LinearQ(space, spaces.Discrete(3), config, seed=0)
    learner.weights[:] = np.random.default_rng(1).normal(size=learner.weights.shape)
    obs = np.array([0.3, -0.2], dtype=np.float32)
    learner.learn(Transitions.single(obs, 2, 1.5, obs, True, False))
    assert learner.q_values(obs[None])[0, 2] == pytest.approx(1.5, rel=1e-12)


def test_linear_q_state_dict_round_trip(tmp_path):
    space = spaces.Box(-1.0, 1.0, shape=(2,), dtype=np.float32)
    config = LinearConfig(
        features="tiles",
        bins=[5],
        n_tilings=4,
        gamma=0.9,
        step_size_count="visits",
        step_size=ScheduleConfig("polynomial", 0.5, power=0.9),
    )
    original = LinearQ(space, spaces.Discrete(3), config, seed=3)

    def run(learner: LinearQ, steps: int, seed: int) -> list[int]:
        rng, x, actions = np.random.default_rng(seed), np.zeros(2, dtype=np.float32), []
        for t in range(steps):
            a = learner.act(x[None])[0]
            x_next = np.clip(x + 0.1 * (a - 1) + 0.05 * rng.normal(size=2), -1, 1).astype(np.float32)
            learner.learn(Transitions.single(x, a, -float(np.sum(x_next**2)), x_next, False, t % 50 == 49))
            actions.append(a)
            x = x_next
        return actions

    run(original, 150, seed=4)
    saved = original.state_dict()
    save_checkpoint(tmp_path / "ck", {"learner": saved})
    continued = run(original, 200, seed=5)  # must not alter the state saved before
    for state in (saved, load_checkpoint(tmp_path / "ck")["learner"]):
        restored = LinearQ(space, spaces.Discrete(3), config, seed=123)
        restored.load_state_dict(state)
        assert run(restored, 200, seed=5) == continued
        np.testing.assert_array_equal(original.weights, restored.weights)
        np.testing.assert_array_equal(original.visits, restored.visits)


def two_state_tiles() -> LinearQ:
    """Observations in [0, 1], 2 uniform tilings of 1 tile width: x = 0.25 has features {0, 2}, x = 0.75 has
    {0, 3} (feature 0 shared), so |phi|^2 = 2; two actions, gamma 0.9, normalised constant step 0.5."""
    config = LinearConfig(features="tiles", bins=[1], n_tilings=2, tile_offsets="uniform", gamma=0.9,
                          step_size=ScheduleConfig("constant", 0.5))
    learner = LinearQ(spaces.Box(0.0, 1.0, shape=(1,), dtype=np.float32), spaces.Discrete(2), config, seed=0)
    learner.weights[:] = [[0.5, 1.0], [0.0, 0.0], [1.0, 0.0], [2.0, 1.0]]  # W[feature, action]
    return learner


def test_linear_batch_update_on_two_states_by_hand():
    # semi-gradient Q-learning (Sutton & Barto 2018, eq. 6.8 with the gradient of sec. 10.1), step alpha / |phi|^2.
    # Q(A, .) = [0.5 + 1, 1 + 0] = [1.5, 1], Q(B, .) = [0.5 + 2, 1 + 1] = [2.5, 2] for A = 0.25, B = 0.75.
    # TD errors, all from the weights before the batch:
    #   (A, a=0, r=1, B, continues):  delta = 1 + 0.9 * 2.5 - 1.5 = 1.75
    #   (B, a=0, r=0, A, terminated): delta = 0 - 2.5 = -2.5
    #   (B, a=1, r=2, A, truncated):  delta = 2 + 0.9 * 1.5 - 2 = 1.35
    # each active weight moves by alpha times the mean of delta / 2 over the transitions that touch it:
    #   W[0, 0] = 0.5 + 0.5 * (1.75 - 2.5) / 4 = 0.40625   W[2, 0] = 1 + 0.5 * 1.75 / 2 = 1.4375
    #   W[3, 0] = 2 - 0.5 * 2.5 / 2 = 1.375               W[0, 1] = 1 + 0.5 * 1.35 / 2 = 1.3375
    #   W[3, 1] = 1 + 0.5 * 1.35 / 2 = 1.3375             W[1, :], W[2, 1] unchanged
    learner = two_state_tiles()
    a, b = [0.25], [0.75]
    batch = Transitions(np.array([a, b, b], dtype=np.float32), np.array([0, 0, 1]), np.array([1.0, 0.0, 2.0]),
                        np.array([b, a, a], dtype=np.float32), np.array([False, True, False]),
                        np.array([False, False, True]))
    learner.learn(batch)
    expected = [[0.40625, 1.3375], [0.0, 0.0], [1.4375, 0.0], [1.375, 1.3375]]
    np.testing.assert_allclose(learner.weights, expected, rtol=1e-14)
    np.testing.assert_array_equal(learner.visits, [[2, 1], [0, 0], [1, 0], [1, 1]])
    # a batch of one is the plain update: the first transition alone moves W[0, 0] and W[2, 0] by 0.5 * 1.75 / 2
    single = two_state_tiles()
    single.learn(Transitions.single(a, 0, 1.0, b, False, False))
    np.testing.assert_allclose(single.weights, [[0.9375, 1.0], [0.0, 0.0], [1.4375, 0.0], [2.0, 1.0]], rtol=1e-14)


def test_linear_act_on_one_observation_repeats_the_one_row_rule():
    # epsilon-greedy for one observation (Sutton & Barto 2018, sec. 2.3) in the learners' draw order
    learner = two_state_tiles()
    learner.weights[:, 1] = [0.5, 0.0, 1.0, 2.5]  # Q(A, .) = [1.5, 1.5] ties (a tie pick draws), Q(B, .) = [2.5, 3]
    rng, epsilon = np.random.default_rng(0), 0.1
    for t in range(60):
        x = np.array([[0.25 if t % 3 else 0.75]], dtype=np.float32)
        q = learner.q_values(x)[0]
        assert learner.act(x)[0] == one_row_rule(q, epsilon, rng)
    assert learner.act_count == 60


@pytest.mark.parametrize(
    ("settings", "pattern"),
    [
        ({"features": "fourier"}, r"features must be one of \['grid', 'tiles', 'rbf', 'quadratic'\]"),
        ({"step_size_count": "episode"}, r"step_size_count must be one of \['step', 'visits'\]"),
        ({"epsilon": ScheduleConfig("linear", 0.5, horizon=0.0)}, "epsilon: schedule horizon must be > 0"),
        ({"n_tilings": 0}, "n_tilings must be an integer >= 1"),
    ],
)
def test_linear_bad_settings_raise(settings, pattern):
    with pytest.raises(ValueError, match=pattern):
        LinearConfig(**settings)


def test_linear_built_from_plain_settings():
    settings = {"features": "rbf", "bins": [4], "step_size": {"kind": "polynomial", "power": 0.8}}
    learner = build_learner("linear", settings, state_space(), spaces.Discrete(N_ACTIONS), seed=0)
    assert isinstance(learner, LinearQ)
    assert learner.weights.shape == (4, N_ACTIONS)


# ------------------------------------------------------------------------------------------- LSTD-Q, discrete


def test_lstdq_with_one_hot_features_is_the_certainty_equivalent_q_star():
    # LSTD on a tabular basis equals the model-based estimate built from the same samples (Boyan 2002, from
    # memory); policy iteration on it ends at the optimal Q of the empirical MDP (Lagoudakis & Parr 2003)
    P, R = random_mdp(0)
    data = sweeps(P, R, np.random.default_rng(3), 1_000)
    config = LSTDQConfig(
        features="grid",
        bins=[N_STATES],
        gamma=GAMMA,
        refit_every=len(data),
        ridge=1e-10,
        tolerance=0.0,
        n_iterations=20,
    )
    learner = LSTDQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    metrics = learner.learn(data)
    assert metrics["refit_samples"] == len(data)
    assert metrics["refit_weight_change"] == pytest.approx(0.0, abs=1e-12)  # policy iteration settled
    s, a = data.obs[:, 0].astype(np.int64), data.action
    counts = np.zeros((N_ACTIONS, N_STATES, N_STATES))
    np.add.at(counts, (a, s, data.next_obs[:, 0].astype(np.int64)), 1.0)
    q_hat = value_iteration(counts / counts.sum(axis=2, keepdims=True), R, GAMMA)
    q = learner.q_values(all_states())
    np.testing.assert_allclose(q, q_hat, atol=1e-6)
    assert np.max(np.abs(q - value_iteration(P, R, GAMMA))) < 0.05
    np.testing.assert_allclose(learner.q(data.obs[:10], a[:10]), q[s[:10], a[:10]])


@pytest.mark.parametrize("terminated", [True, False])
def test_lstdq_bootstraps_through_truncation_only(terminated):
    # one state, reward 1 every step: Q = 1 if every step terminates; after truncations the learner
    # bootstraps, so Q = 1 / (1 - gamma) = 10 at gamma = 0.9 (geometric series; common practice, no source)
    space = spaces.Box(-0.5, 0.5, shape=(1,), dtype=np.float32)
    config = LSTDQConfig(features="grid", bins=[1], gamma=0.9, refit_every=4, ridge=1e-12)
    learner = LSTDQ(space, spaces.Discrete(2), config, seed=0)
    flag = np.full(4, terminated)
    zeros = np.zeros((4, 1), dtype=np.float32)
    learner.learn(Transitions(zeros, np.array([0, 1, 0, 1]), np.ones(4), zeros, flag, ~flag))
    expected = 1.0 if terminated else 10.0
    np.testing.assert_allclose(learner.q_values(zeros[:1]), [[expected, expected]], rtol=1e-9)


# --------------------------------------------------------------------------------------- LSTD-Q, continuous LQ

A_LQ = np.array([[1.0, 0.1], [0.0, 1.0]])  # double integrator, dt = 0.1 s
B_LQ = np.array([[0.005], [0.1]])
Q_LQ, R_LQ, GAMMA_LQ = np.eye(2), 0.1 * np.eye(1), 0.95
K0 = [[1.0, 2.0]]  # stabilising: spectral radius of A - B K0 is about 0.92


def lq_learner(seed: int = 0) -> tuple[gym.Env, LSTDQ]:
    env = gym.make("qlab/LinearQuadratic-v0", A=A_LQ, B=B_LQ, Q=Q_LQ, R=R_LQ, control_bound=None, max_steps=50)
    config = LSTDQConfig(
        features="quadratic",
        gamma=GAMMA_LQ,
        refit_every=250,
        n_iterations=10,
        ridge=1e-9,
        exploration_std=0.5,
        initial_gain=K0,
    )
    return env, LSTDQ(env.observation_space, env.action_space, config, seed)


def run_lq(env: gym.Env, learner: LSTDQ, steps: int, seed: int) -> list[np.ndarray]:
    obs, _ = env.reset(seed=seed)
    actions = []
    for _ in range(steps):
        u = learner.act(obs[None])[0]
        next_obs, reward, terminated, truncated, _ = env.step(u)
        learner.learn(Transitions.single(obs, u, reward, next_obs, terminated, truncated))
        actions.append(u)
        obs = next_obs
        if terminated or truncated:
            obs, _ = env.reset()
    return actions


def test_lstdq_recovers_the_lq_q_function_and_gain():
    env, learner = lq_learner()
    x = np.array([[0.4, -0.7], [1.0, 0.5]])
    # before the first fit the policy is the initial gain, u = -K0 x
    np.testing.assert_allclose(learner.greedy(x), -x @ np.array(K0).T)
    run_lq(env, learner, 1_000, seed=0)
    K_star, H = lq_solution(A_LQ, B_LQ, Q_LQ, R_LQ, GAMMA_LQ)
    M, g, c = learner.head.quad.to_matrix(learner.head.weights)
    # Bradtke, Ydstie & Barto (1994): policy iteration on a quadratic Q recovers H and K*; reward = -cost
    assert np.linalg.norm(-M - H) / np.linalg.norm(H) < 0.02
    assert np.linalg.norm(learner.head.gain - K_star) / np.linalg.norm(K_star) < 0.02
    np.testing.assert_allclose(learner.greedy(x), -x @ K_star.T, rtol=0.02)
    assert np.max(np.abs(g)) < 0.02 * np.max(np.abs(H)) and abs(c) < 0.02 * np.max(np.abs(H))
    np.testing.assert_allclose(learner.value(x), learner.q(x, learner.greedy(x)))
    with pytest.raises(ValueError, match="q_values needs a finite action set"):
        learner.q_values(x)


def test_lstdq_act_on_a_batch():
    # continuous: greedy control -K0 x plus Gaussian noise N(0, exploration_std^2) per row (Bradtke, Ydstie &
    # Barto 1994); one observation draws as before batches, one standard normal per control dimension
    _, learner = lq_learner(seed=4)
    x = np.array([[0.4, -0.7]], dtype=np.float32)
    rng = np.random.default_rng(4)
    for _ in range(5):
        expected = -x[0] @ np.array(K0).T + 0.5 * rng.standard_normal(1)
        np.testing.assert_array_equal(learner.act(x)[0], expected.astype(np.float32))
    u = learner.act(np.repeat(x, 4000, axis=0))
    assert u.shape == (4000, 1) and u.dtype == np.float32 and learner.act_count == 4005
    noise = u[:, 0] + x[0] @ np.array(K0)[0]
    assert abs(noise.mean()) < 3 * 0.5 / np.sqrt(4000) and noise.std() == pytest.approx(0.5, rel=0.05)
    # discrete: epsilon-greedy indices, one per row, epsilon counted per row
    config = LSTDQConfig(features="grid", bins=[N_STATES], epsilon=ScheduleConfig("linear", 1.0, 0.0, 5.0))
    discrete = LSTDQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
    discrete.head.weights[:] = np.arange(discrete.head.n_params)  # action 1 is greedy everywhere
    actions = discrete.act(np.tile(all_states(), (2, 1)))
    assert actions.shape == (10,) and actions.dtype == np.int64 and discrete.act_count == 10
    np.testing.assert_array_equal(discrete.act(all_states()), 1)  # count >= 5: epsilon 0


def test_lstdq_state_dict_round_trip_continuous(tmp_path):
    env, original = lq_learner(seed=1)
    run_lq(env, original, 300, seed=2)
    saved = original.state_dict()
    save_checkpoint(tmp_path / "ck", {"learner": saved})
    continued = np.array(run_lq(env, original, 300, seed=3))  # must not alter the state saved before
    for state in (saved, load_checkpoint(tmp_path / "ck")["learner"]):
        _, restored = lq_learner(seed=77)
        restored.load_state_dict(state)
        np.testing.assert_array_equal(np.array(run_lq(env, restored, 300, seed=3)), continued)
        np.testing.assert_array_equal(original.head.weights, restored.head.weights)
        np.testing.assert_array_equal(original.head.gain, restored.head.gain)


def test_lstdq_state_dict_round_trip_discrete(tmp_path):
    P, R = random_mdp(2)
    config = LSTDQConfig(
        features="tiles",
        bins=[3],
        n_tilings=2,
        gamma=0.8,
        refit_every=40,
        epsilon=ScheduleConfig("linear", 1.0, 0.1, 200.0),
        max_samples=150,
    )
    original = LSTDQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=5)

    def run(learner: LSTDQ, steps: int, seed: int) -> list[int]:
        rng, s, actions = np.random.default_rng(seed), 0, []
        for _ in range(steps):
            a = learner.act(np.array([[s]], dtype=np.float32))[0]
            s_next = int(rng.choice(N_STATES, p=P[a, s]))
            learner.learn(Transitions.single([s], a, R[s, a], [s_next], False, False))
            actions.append(a)
            s = s_next
        return actions

    run(original, 190, seed=6)  # past max_samples: the ring of stored transitions has wrapped
    saved = original.state_dict()
    save_checkpoint(tmp_path / "ck", {"learner": saved})
    q_saved = original.q_values(all_states())
    continued = run(original, 25, seed=7)  # refits once, at 200 transitions; must not alter the saved state
    for state in (saved, load_checkpoint(tmp_path / "ck")["learner"]):
        restored = LSTDQ(state_space(), spaces.Discrete(N_ACTIONS), config, seed=0)
        restored.load_state_dict(state)
        np.testing.assert_array_equal(restored.q_values(all_states()), q_saved)
        assert run(restored, 25, seed=7) == continued
        np.testing.assert_array_equal(original.q_values(all_states()), restored.q_values(all_states()))


@pytest.mark.parametrize(
    ("settings", "pattern"),
    [
        ({"refit_every": 0}, "refit_every must be an integer >= 1"),
        ({"n_iterations": 0}, "n_iterations must be an integer >= 1"),
        ({"max_samples": 0}, "max_samples must be an integer >= 1"),
        ({"ridge": 0.0}, "ridge must be a finite number > 0"),
        ({"exploration_std": -0.1}, "exploration_std must be a finite number >= 0"),
        ({"gamma": -0.1}, r"gamma must lie in \[0, 1\]"),
        ({"initial_gain": [[1.0, 2.0], [3.0]]}, "initial_gain must be a list of equally long rows"),
        ({"features": "wavelets"}, r"features must be one of \['grid', 'tiles', 'rbf', 'quadratic'\]"),
    ],
)
def test_lstdq_bad_settings_raise(settings, pattern):
    with pytest.raises(ValueError, match=pattern):
        LSTDQConfig(**settings)


def test_lstdq_settings_must_fit_the_spaces():
    box = spaces.Box(-np.inf, np.inf, shape=(2,), dtype=np.float32)
    control = spaces.Box(-np.inf, np.inf, shape=(1,), dtype=np.float32)
    with pytest.raises(ValueError, match="features must be 'quadratic' for continuous actions"):
        LSTDQ(box, control, LSTDQConfig(features="tiles"), seed=0)
    with pytest.raises(ValueError, match=r"initial_gain must be a finite 1 x 2 list of lists"):
        LSTDQ(box, control, LSTDQConfig(features="quadratic", initial_gain=[[1.0, 2.0, 3.0]]), seed=0)
    with pytest.raises(ValueError, match="initial_gain applies to continuous actions only"):
        LSTDQ(state_space(), spaces.Discrete(2), LSTDQConfig(features="grid", initial_gain=[[1.0]]), seed=0)


def test_lstdq_built_from_plain_settings():
    settings = {"features": "quadratic", "initial_gain": [[1.0, 2.0]], "exploration_std": 0.2}
    box = spaces.Box(-np.inf, np.inf, shape=(2,), dtype=np.float32)
    learner = build_learner("lstdq", settings, box, spaces.Box(-1.0, 1.0, shape=(1,), dtype=np.float32), seed=0)
    assert isinstance(learner, LSTDQ)
    # greedy controls are clipped to the action bounds: -K0 x = -(1 * 2 + 2 * 1) = -4 -> -1
    np.testing.assert_allclose(learner.greedy(np.array([[2.0, 1.0]])), [[-1.0]])
