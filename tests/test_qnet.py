"""Q-network learner: target estimators, convergence to exact answers, exact resume, settings checks."""

from __future__ import annotations

from copy import deepcopy

import gymnasium as gym
import numpy as np
import pytest
import scipy.integrate
import scipy.stats
import torch
from gymnasium import spaces

import qlab  # noqa: F401  (registers the qlab tasks)
from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.copies import make_copies
from qlab.learners import build_learner
from qlab.learners.protocol import Learner, Transitions
from qlab.learners.qnet import QNetConfig, QNetLearner, bootstrap_values
from qlab.learners.scaling import InputScaler
from qlab.learners.schedules import ScheduleConfig
from qlab.reference import lq_solution, value_iteration

# --- max vs double estimator (van Hasselt 2010) ------------------------------------------------


def _expected_max_of_normals(n: int) -> float:
    """E[max of n iid N(0, 1)] = integral of x n phi(x) Phi(x)^(n-1) dx (scipy.integrate.quad, scipy.stats.norm)."""
    norm = scipy.stats.norm
    value, _ = scipy.integrate.quad(lambda x: x * n * norm.pdf(x) * norm.cdf(x) ** (n - 1), -np.inf, np.inf)
    return value


@pytest.mark.parametrize("n_actions", [2, 3, 5, 10])
def test_max_estimator_bias_and_unbiased_double_estimator(n_actions):
    samples = 200_000
    gen = torch.Generator().manual_seed(n_actions)
    # every action's true value is 0; both networks' estimates carry independent N(0, 1) noise
    q_online = torch.randn(samples, n_actions, generator=gen, dtype=torch.float64)
    q_target = torch.randn(samples, n_actions, generator=gen, dtype=torch.float64)
    single = bootstrap_values(q_online, q_target, double=False).numpy()
    double = bootstrap_values(q_online, q_target, double=True).numpy()
    if n_actions == 2:
        expected = 1.0 / np.sqrt(np.pi)  # expected maximum of 2 standard normals (order statistics; from memory)
    elif n_actions == 3:
        expected = 3.0 / (2.0 * np.sqrt(np.pi))  # expected max of 3 standard normals (order statistics; from memory)
    else:
        expected = _expected_max_of_normals(n_actions)  # scipy.integrate.quad with scipy.stats.norm
    se_single = single.std(ddof=1) / np.sqrt(samples)
    assert abs(single.mean() - expected) < 3 * se_single
    # van Hasselt (2010), "Double Q-learning": the double estimator is unbiased here (never over)
    se_double = double.std(ddof=1) / np.sqrt(samples)
    assert abs(double.mean()) < 3 * se_double


def test_closed_forms_agree_with_the_integral():
    # order statistics of the normal vs scipy.integrate.quad (the two references used above)
    assert _expected_max_of_normals(2) == pytest.approx(1.0 / np.sqrt(np.pi), abs=1e-9)
    assert _expected_max_of_normals(3) == pytest.approx(3.0 / (2.0 * np.sqrt(np.pi)), abs=1e-9)


# --- convergence on a finite MDP ------------------------------------------------------------


def _slippery_chain(n_states: int = 6, slip: float = 0.1) -> tuple[np.ndarray, np.ndarray]:
    """Chain 0..n-1, last state an absorbing goal; 'left'/'right' move as told w.p. 1 - 2*slip,
    stay w.p. slip, move the other way w.p. slip; reward 1 on entering the goal."""
    goal = n_states - 1
    P = np.zeros((2, n_states, n_states))
    for s in range(goal):
        for a, step in ((0, -1), (1, 1)):
            for move, p in ((step, 1 - 2 * slip), (0, slip), (-step, slip)):
                P[a, s, min(max(s + move, 0), goal)] += p
    P[:, goal, goal] = 1.0
    R = P[:, :, goal].T.copy()
    R[goal] = 0.0
    return P, R


def test_q_converges_to_value_iteration_on_a_finite_mdp():
    P, R = _slippery_chain()
    gamma, n_states, goal = 0.9, P.shape[1], P.shape[1] - 1
    q_star = value_iteration(P, R, gamma)  # exact Q* (qlab.reference, checked there against Sutton & Barto)
    # n_step=1: the transitions are drawn independently, not along episodes, so only one-step targets apply
    cfg = QNetConfig(hidden_sizes=[32], gamma=gamma, n_step=1, learning_rate=3e-3, batch_size=64,
                     replay_capacity=20_000, warmup_steps=256, update_every=16, target_update_every=50, loss="squared",
                     double_estimator=True, epsilon=ScheduleConfig("constant", 0.0))
    learner = QNetLearner(spaces.Box(0.0, 1.0, (n_states,)), spaces.Discrete(2), cfg, seed=0)
    rng = np.random.default_rng(0)
    one_hot = np.eye(n_states, dtype=np.float32)
    cumulative = P.cumsum(axis=2)
    for _ in range(1500):  # 16 transitions from uniformly drawn (s, a) per call, one update per call
        s, a = rng.integers(0, goal, 16), rng.integers(0, 2, 16)
        s_next = (rng.random(16)[:, None] > cumulative[a, s]).sum(axis=1)
        reached = s_next == goal
        learner.learn(Transitions(one_hot[s], a, reached.astype(np.float64), one_hot[s_next], reached,
                                  np.zeros(16, bool)))
    q = learner.q_values(one_hot[:goal])
    assert np.abs(q - q_star[:goal]).max() < 0.1
    np.testing.assert_array_equal(learner.greedy(one_hot[:goal]), q_star[:goal].argmax(axis=1))


# --- linear-quadratic calibration -----------------------------------------------------------


def test_greedy_action_follows_the_lq_gain():
    gamma = 0.9
    A, B, Q, R = [[1.0]], [[1.0]], [[1.0]], [[1.0]]
    env = gym.make("qlab/LinearQuadratic-v0", A=A, B=B, Q=Q, R=R, action_kind="discrete", n_levels=21,
                   control_bound=1.0, max_steps=50)
    task = env.unwrapped
    K, _ = lq_solution(A, B, Q, R, gamma)  # discounted Riccati solution (qlab.reference.lq, checked there)
    # n_step=1: the transitions are drawn independently, not along episodes, so only one-step targets apply
    cfg = QNetConfig(hidden_sizes=[64, 64], gamma=gamma, n_step=1, learning_rate=1e-3, batch_size=128,
                     replay_capacity=50_000, warmup_steps=512, update_every=16, target_update_every=100, loss="squared",
                     double_estimator=True, epsilon=ScheduleConfig("constant", 0.0))
    learner = QNetLearner(env.observation_space, env.action_space, cfg, seed=0)
    rng = np.random.default_rng(0)
    for _ in range(2500):  # states uniform on [-2, 2], actions uniform on the grid: the task's own physics
        x, a = rng.uniform(-2.0, 2.0, (16, 1)), rng.integers(0, 21, 16)
        out = task.batch_step(x, task.controls(a), rng)
        learner.learn(Transitions(task.observe(x), a, out.base_reward, task.observe(out.next_state),
                                  out.terminated, np.zeros(16, bool)))
    levels = task.control_levels[:, 0]
    spacing = levels[1] - levels[0]  # 0.1
    xs = np.linspace(-1.0, 1.0, 41)[:, None]  # well inside the data; -K x stays inside the grid
    u = levels[learner.greedy(xs.astype(np.float32))]
    error_in_steps = np.abs(u - (-K[0, 0] * xs[:, 0])) / spacing
    # the nearest level is within half a step; allow one more level of learning error
    assert error_in_steps.max() <= 1.5


# --- exact resume --------------------------------------------------------------------------

RESUME_CFG = QNetConfig(hidden_sizes=[16, 16], gamma=0.95, learning_rate=1e-3, batch_size=16, replay_capacity=500,
                        warmup_steps=40, update_every=2, target_update_every=10, n_step=3, double_estimator=True,
                        epsilon=ScheduleConfig("linear", 1.0, 0.1, 150.0))


def _make_env() -> gym.Env:
    return gym.make("qlab/LinearQuadratic-v0", action_kind="discrete", n_levels=5, noise_cov=[[1e-4, 0], [0, 1e-4]],
                    max_steps=25)


def _train(seed: int, n_episodes: int, ckpt=None, stop_after: int | None = None, resume: bool = False):
    """Episodes with resets seeded from (run seed, episode index); checkpoint after every episode."""
    env = _make_env()
    learner = QNetLearner(env.observation_space, env.action_space, RESUME_CFG, seed=seed if not resume else 12345)
    returns: list[float] = []
    start = 0
    if resume:
        tree = load_checkpoint(ckpt)
        learner.load_state_dict(tree["learner"])
        returns, start = list(tree["loop"]["returns"]), int(tree["loop"]["episode"])
    saved = 0
    for episode in range(start, n_episodes):
        reset_seed = int(np.random.SeedSequence([seed, episode]).generate_state(1)[0])
        obs, _ = env.reset(seed=reset_seed)
        total, done = 0.0, False
        while not done:
            action = learner.act(obs[None])[0]
            next_obs, reward, terminated, truncated, _ = env.step(action)
            learner.learn(Transitions.single(obs, action, reward, next_obs, terminated, truncated))
            obs, total, done = next_obs, total + reward, terminated or truncated
        returns.append(total)
        if ckpt is not None:
            loop = {"episode": episode + 1, "returns": returns}
            save_checkpoint(ckpt, {"learner": learner.state_dict(), "loop": loop})
            saved += 1
            if saved == stop_after:
                break
    return learner, returns


def _assert_same_tree(a, b, path=""):
    if isinstance(a, dict):
        assert set(a) == set(b), path
        for key in a:
            _assert_same_tree(a[key], b[key], f"{path}/{key}")
    elif isinstance(a, list | tuple):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_same_tree(x, y, f"{path}/{i}")
    elif isinstance(a, torch.Tensor):
        assert torch.equal(a, b), path
    elif isinstance(a, np.ndarray):
        np.testing.assert_array_equal(a, b, err_msg=path)
    else:
        assert a == b, path


def test_resume_from_checkpoint_equals_uninterrupted_run(tmp_path):
    seed, n_episodes = 7, 7
    full, full_returns = _train(seed, n_episodes)
    _, first_part = _train(seed, n_episodes, ckpt=tmp_path / "run", stop_after=3)
    assert len(first_part) == 3
    resumed, resumed_returns = _train(seed, n_episodes, ckpt=tmp_path / "run", resume=True)
    assert full.updates > 0 and resumed.updates == full.updates
    assert resumed_returns == full_returns
    _assert_same_tree(full.state_dict(), resumed.state_dict())


def test_same_seed_same_run_and_other_seed_differs():
    _, a = _train(3, 3)
    _, b = _train(3, 3)
    _, c = _train(4, 3)
    assert a == b and a != c


# --- mechanics ----------------------------------------------------------------------------


def _filled_learner(cfg: QNetConfig, reward: float = 0.0, seed: int = 0) -> tuple[QNetLearner, Transitions]:
    learner = QNetLearner(spaces.Box(-1.0, 1.0, (3,)), spaces.Discrete(4), cfg, seed=seed)
    rng = np.random.default_rng(seed)
    batch = Transitions(rng.uniform(-1, 1, (8, 3)).astype(np.float32), rng.integers(0, 4, 8), np.full(8, reward),
                        rng.uniform(-1, 1, (8, 3)).astype(np.float32), np.zeros(8, bool), np.zeros(8, bool))
    return learner, batch


def test_learner_honours_the_protocol_shapes():
    learner, batch = _filled_learner(QNetConfig(batch_size=4, warmup_steps=8, update_every=8))
    assert isinstance(learner, Learner)
    assert learner.learn(batch)["updates"] == 1.0
    obs = batch.obs
    q = learner.q_values(obs)
    assert q.shape == (8, 4)
    np.testing.assert_array_equal(learner.greedy(obs), q.argmax(axis=1))
    np.testing.assert_allclose(learner.value(obs), q.max(axis=1))
    actions = learner.act(obs)
    assert actions.shape == (8,) and actions.dtype == np.int64 and set(actions) <= set(range(4))


def test_no_update_before_warmup_then_every_k_steps():
    learner, batch = _filled_learner(QNetConfig(batch_size=4, warmup_steps=16, update_every=4))
    assert learner.learn(batch) == {}  # 8 env steps < warm-up
    metrics = learner.learn(batch)  # steps 9..16: updates due at 16 only
    assert metrics["updates"] == 1.0
    assert learner.learn(batch)["updates"] == 3.0  # steps 17..24: due at 20 and 24


def test_periodic_copy_and_polyak_target():
    learner, batch = _filled_learner(QNetConfig(batch_size=4, warmup_steps=0, update_every=8, target_update_every=2))
    initial = [p.clone() for p in learner.target.parameters()]
    learner.learn(batch)  # one update: target still the initial copy
    assert all(torch.equal(p, q) for p, q in zip(learner.target.parameters(), initial, strict=True))
    learner.learn(batch)  # second update: hard copy
    assert all(torch.equal(p, q) for p, q in zip(learner.target.parameters(), learner.online.parameters(), strict=True))

    tau = 0.25
    learner, batch = _filled_learner(QNetConfig(batch_size=4, warmup_steps=0, update_every=8, polyak_tau=tau))
    old_target = [p.clone() for p in learner.target.parameters()]
    learner.learn(batch)
    # soft target update theta' <- tau theta + (1 - tau) theta' (Lillicrap et al. 2016, Algorithm 1)
    for new, old, online in zip(learner.target.parameters(), old_target, learner.online.parameters(), strict=True):
        torch.testing.assert_close(new, tau * online + (1 - tau) * old)


@pytest.mark.parametrize("kind", ["l2", "l1"])
def test_weight_penalty_is_reported_on_the_weight_matrices(kind):
    cfg = QNetConfig(batch_size=4, warmup_steps=0, update_every=8, weight_penalty=kind, penalty_coef=0.1)
    learner, batch = _filled_learner(cfg)
    weights = [m.weight.detach().clone() for m in learner.online if isinstance(m, torch.nn.Linear)]
    expected = sum(float((w**2 if kind == "l2" else w.abs()).sum()) for w in weights)
    assert learner.learn(batch)["penalty"] == pytest.approx(expected, rel=1e-5)


def test_nonfinite_loss_is_flagged_and_the_update_skipped():
    learner, batch = _filled_learner(QNetConfig(batch_size=4, warmup_steps=0, update_every=8), reward=np.inf)
    before = [p.clone() for p in learner.online.parameters()]
    metrics = learner.learn(batch)
    assert metrics["nonfinite"] == 1.0 and metrics["updates"] == 0.0
    assert all(torch.equal(p, q) for p, q in zip(learner.online.parameters(), before, strict=True))


@pytest.mark.parametrize(
    ("changes", "name"),
    [
        ({"batch_size": 0}, "batch_size"),
        ({"batch_size": 64, "replay_capacity": 32}, "replay_capacity"),
        ({"loss": "absolute"}, "loss"),
        ({"n_step": 0}, "n_step"),
        ({"weight_penalty": "l3"}, "weight_penalty"),
        ({"penalty_coef": -1.0}, "penalty_coef"),
        ({"polyak_tau": 1.5}, "polyak_tau"),
        ({"target_update_every": 0}, "target_update_every"),
        ({"update_every": 0}, "update_every"),
        ({"warmup_steps": -1}, "warmup_steps"),
        ({"hidden_sizes": []}, "hidden_sizes"),
        ({"hidden_sizes": [8, 0]}, "hidden_sizes"),
        ({"gamma": 1.2}, "gamma"),
        ({"learning_rate": 0.0}, "learning_rate"),
        ({"huber_delta": 0.0}, "huber_delta"),
        ({"epsilon": ScheduleConfig("cosine")}, "epsilon: schedule kind"),
        ({"epsilon": ScheduleConfig("linear", 2.0)}, "epsilon.start"),
        ({"epsilon": ScheduleConfig("linear", 1.0, horizon=0.0)}, "epsilon: schedule horizon"),
        ({"grad_clip_norm": -1.0}, "grad_clip_norm"),
        ({"torch_threads": 0}, "torch_threads"),
        ({"scale_inputs": "yes"}, "scale_inputs"),
        ({"priority_exponent": -0.5}, "priority_exponent"),
        ({"priority_offset": 0.0}, "priority_offset"),
        ({"importance_exponent_start": 1.5}, "importance_exponent_start"),
        ({"importance_anneal_steps": 0}, "importance_anneal_steps"),
    ],
)
def test_bad_settings_raise_naming_the_setting(changes, name):
    with pytest.raises(ValueError, match=name):
        QNetConfig(**changes)


def test_only_discrete_actions_and_flat_boxes():
    box = spaces.Box(-1.0, 1.0, (2,))
    with pytest.raises(ValueError, match="action_space"):
        QNetLearner(box, spaces.Box(-1.0, 1.0, (1,)), QNetConfig(), seed=0)
    with pytest.raises(ValueError, match="observation_space"):
        QNetLearner(spaces.Discrete(3), spaces.Discrete(2), QNetConfig(), seed=0)


def test_act_on_one_observation_repeats_the_one_row_rule():
    # epsilon-greedy (Sutton & Barto 2018, sec. 2.3) with epsilon at the env-step count and ties to the lowest
    # index, in the draw order used before acting on batches: a uniform, then a random action if exploring
    learner, batch = _filled_learner(QNetConfig(epsilon=ScheduleConfig("linear", 1.0, 0.0, 40.0)))
    rng = np.random.default_rng(0)
    for t in range(40):
        obs = batch.obs[t % 8][None]
        explore = rng.random() < learner.epsilon(learner.env_steps)
        expected = int(rng.integers(4)) if explore else int(learner.q_values(obs)[0].argmax())
        assert learner.act(obs)[0] == expected
        learner.learn(Transitions.single(obs[0], expected, 0.0, obs[0], False, False))  # one env step
    assert learner.rng.bit_generator.state == rng.bit_generator.state
    np.testing.assert_array_equal(learner.act(batch.obs), learner.greedy(batch.obs))  # 40 steps on: epsilon 0


def test_copies_keep_their_own_n_step_returns_end_to_end():
    # n-step return (Sutton & Barto 2018, eq. 7.1): r_t + gamma r_t+1 + ... + gamma^(m-1) r_t+m-1, bootstrapped
    # with gamma^m unless the last step terminated, summed along one copy's own episode, m <= n. Four Dock
    # copies act, step and learn as one batch per step; episodes end at different times in different copies.
    n_copies, gamma, n_step = 4, 0.9, 3
    dock = {"velocity_noise_m_s": 0.05, "start_distance_m": (2.0, 4.0), "max_steps": 9}
    copies = make_copies(lambda: gym.make("qlab/Dock-v0", **dock), n_copies, "potential", gamma)
    cfg = QNetConfig(hidden_sizes=[8], gamma=gamma, batch_size=8, replay_capacity=1024, warmup_steps=32,
                     update_every=4, n_step=n_step, epsilon=ScheduleConfig("constant", 0.5))
    learner = QNetLearner(copies.observation_space, copies.action_space, cfg, seed=0)
    episodes: list[list[list[tuple]]] = [[[]] for _ in range(n_copies)]  # copy -> episodes -> transitions
    copies.reset(None, np.arange(n_copies))
    for t in range(40):
        ended = copies.done.copy()
        if ended.any():
            copies.reset(ended, 100 * (t + 1) + np.flatnonzero(ended))
            for i in np.flatnonzero(ended):
                episodes[i].append([])
        step = copies.step(learner.act(copies.observe()))
        learner.learn(Transitions(step.obs, step.action, step.reward, step.next_obs, step.terminated, step.truncated))
        for i in range(n_copies):
            episodes[i][-1].append((step.obs[i], step.action[i], step.reward[i], step.next_obs[i], step.terminated[i]))
    assert learner.env_steps == 160 and learner.updates == (160 - 32) // 4 + 1  # one update per 4 transitions
    ends = [len(e) for copy in episodes for e in copy[:-1]]
    assert len(set(ends)) > 1 and sum(e[-1][4] for copy in episodes for e in copy[:-1]) > 0  # terminations too

    expected = {}
    for copy in episodes:
        for episode in copy:
            for p, (obs, action, *_rest) in enumerate(episode):
                following = episode[p : p + n_step]
                ret = sum(gamma**k * tr[2] for k, tr in enumerate(following))
                discount = 0.0 if following[-1][4] else gamma ** len(following)
                key = obs.tobytes()
                assert key not in expected  # observations identify transitions
                expected[key] = (action, ret, following[-1][3], discount)
    sample = learner.replay.gather(np.arange(len(learner.replay)))
    assert len(learner.replay) == len(expected) == 160
    for k in range(160):
        action, ret, bootstrap_obs, discount = expected[sample.obs[k].tobytes()]
        assert sample.action[k] == action
        assert sample.reward[k] == pytest.approx(ret, rel=1e-12, abs=1e-12)
        np.testing.assert_array_equal(sample.next_obs[k], bootstrap_obs)
        assert sample.discount[k] == pytest.approx(discount, rel=1e-12)


# --- input scaling ------------------------------------------------------------------------------


def test_scaler_maps_box_corners_to_minus_one_and_one():
    low = np.array([-150.0, 0.0, 2.0, -np.inf, -1.0])
    high = np.array([2.5, 1.0, 2.0, np.inf, np.inf])
    scaler = InputScaler(low, high)
    np.testing.assert_array_equal(scaler.bounded, [True, True, True, False, False])
    corners = np.array([[-150.0, 0.0, 2.0, 3.0, 4.0], [2.5, 1.0, 2.0, 3.0, 4.0]])
    # bounded: low -> -1, high -> 1 (a point interval -> 0); unbounded: unchanged before any statistics
    np.testing.assert_array_equal(scaler.transform(corners), [[-1, -1, 0, 3, 4], [1, 1, 0, 3, 4]])
    np.testing.assert_allclose(scaler.transform([[-73.75, 0.5, 2.0, 0.0, 0.0]])[0, :3], [0, 0, 0], atol=1e-6)


def test_running_moments_match_numpy_on_a_stream_in_uneven_batches():
    rng = np.random.default_rng(0)
    stream = 1e3 + rng.normal(size=(96, 3)) * [1.0, 1e-2, 50.0]  # a large mean: the update must not cancel
    scaler = InputScaler(np.full(3, -np.inf), np.full(3, np.inf))
    for part in np.split(stream, [1, 8, 11, 61, 63]):  # batches of 1, 7, 3, 50, 2 and 33 rows
        scaler.update(part)
    assert scaler.count == 96
    np.testing.assert_allclose(scaler.mean, np.mean(stream, axis=0), rtol=1e-12)  # numpy.mean
    np.testing.assert_allclose(scaler.variance, np.var(stream, axis=0), rtol=1e-9)  # numpy.var (ddof=0)
    z = scaler.transform(stream).astype(np.float64)
    np.testing.assert_allclose(z.mean(axis=0), 0.0, atol=1e-5)
    np.testing.assert_allclose(z.std(axis=0), 1.0, rtol=1e-4)  # the floor 1e-8 against var ~1e-4: 5e-5 relative


def test_unbounded_dimensions_pass_unchanged_without_standardisation():
    scaler = InputScaler(np.array([-4.0, -np.inf]), np.array([4.0, np.inf]), standardise=False)
    stream = np.random.default_rng(4).normal(3.0, 2.0, (50, 2))
    scaler.update(stream)
    assert scaler.count == 0
    np.testing.assert_allclose(scaler.transform(stream), np.column_stack([stream[:, 0] / 4.0, stream[:, 1]]), rtol=1e-6)
    with pytest.raises(ValueError, match="standardise_unbounded must be true or false"):
        QNetConfig(standardise_unbounded="no")


def test_learner_scales_inputs_with_statistics_of_learned_observations_only():
    box = spaces.Box(np.array([-2.0, -np.inf], np.float32), np.array([2.0, np.inf], np.float32))
    cfg = QNetConfig(hidden_sizes=[8], batch_size=4, warmup_steps=100, standardise_unbounded=True)
    learner = QNetLearner(box, spaces.Discrete(3), cfg, seed=0)
    rng = np.random.default_rng(1)
    seen = []
    for b in (4, 4, 4):  # one stream layout: every batch of the same size
        obs = rng.normal(5.0, 3.0, (b, 2)).astype(np.float32)
        seen.append(obs)
        learner.act(rng.normal(size=(7, 2)))  # acting leaves the statistics alone
        learner.learn(Transitions(obs, rng.integers(0, 3, b), np.zeros(b), obs, np.zeros(b, bool), np.zeros(b, bool)))
    seen = np.concatenate(seen).astype(np.float64)
    np.testing.assert_allclose(learner.scaler.mean, seen.mean(axis=0), rtol=1e-12)  # numpy.mean
    np.testing.assert_allclose(learner.scaler.variance, seen.var(axis=0), rtol=1e-9)  # numpy.var
    obs = np.array([[2.0, 5.0], [-2.0, seen[:, 1].mean()]], np.float32)
    expected = [[1.0, (5.0 - seen[:, 1].mean()) / seen[:, 1].std()], [-1.0, 0.0]]
    with torch.no_grad():
        q = learner.online(torch.tensor(expected, dtype=torch.float32)).double().numpy()
    np.testing.assert_allclose(learner.q_values(obs), q, rtol=1e-5, atol=1e-6)
    off = QNetLearner(box, spaces.Discrete(3), QNetConfig(hidden_sizes=[8], scale_inputs=False), seed=0)
    with torch.no_grad():
        np.testing.assert_array_equal(off.q_values(obs), off.online(torch.from_numpy(obs)).double().numpy())


@pytest.mark.parametrize("head", ["plain", "dueling"])
def test_best_fit_scales_by_the_fitted_observations_not_the_learner(head):
    box = spaces.Box(np.array([0.0, -np.inf], np.float32), np.array([4.0, np.inf], np.float32))
    rng = np.random.default_rng(2)
    obs = np.column_stack([rng.uniform(0, 4, 40), rng.normal(30.0, 7.0, 40)]).astype(np.float32)
    targets = np.column_stack([obs[:, 0] - 0.01 * obs[:, 1], np.sin(obs[:, 0])])
    cfg = QNetConfig(hidden_sizes=[8], batch_size=4, warmup_steps=0, update_every=4, head=head,
                     standardise_unbounded=True)
    trained = QNetLearner(box, spaces.Discrete(2), cfg, seed=5)
    for _ in range(3):  # other weights and other running statistics
        trained.learn(Transitions(obs[:4] * 3, np.zeros(4, np.int64), np.ones(4), obs[:4], np.zeros(4, bool),
                                  np.zeros(4, bool)))
    fit = trained.fit_function_class(obs, targets, steps=50)
    np.testing.assert_array_equal(fit, QNetLearner(box, spaces.Discrete(2), cfg, seed=0).fit_function_class(
        obs, targets, steps=50))
    # the same head fitted without scaling on observations standardised by hand gives the same numbers:
    # [0, 4] -> [-1, 1]; the unbounded column by its own mean and variance (numpy.mean, numpy.var)
    by_hand = np.column_stack([obs[:, 0] / 2.0 - 1.0, (obs[:, 1] - np.mean(obs[:, 1], dtype=np.float64))
                               / np.sqrt(np.var(obs[:, 1], dtype=np.float64) + 1e-8)]).astype(np.float32)
    plain = QNetLearner(box, spaces.Discrete(2), QNetConfig(hidden_sizes=[8], head=head, scale_inputs=False), seed=0)
    np.testing.assert_allclose(fit, plain.fit_function_class(by_hand, targets, steps=50), rtol=1e-4, atol=1e-5)


# --- dueling head -------------------------------------------------------------------------------


def test_dueling_head_combines_the_streams_as_eq_9():
    cfg = QNetConfig(hidden_sizes=[2], head="dueling", scale_inputs=False)
    learner = QNetLearner(spaces.Box(-np.inf, np.inf, (2,)), spaces.Discrete(3), cfg, seed=0)
    net = learner.online
    with torch.no_grad():
        net.shared[0].weight.copy_(torch.tensor([[1.0, 0.0], [0.0, -1.0]]))
        net.shared[0].bias.copy_(torch.tensor([0.0, 0.5]))
        net.value.weight.copy_(torch.tensor([[1.0, 1.0]]))
        net.value.bias.copy_(torch.tensor([0.5]))
        net.advantage.weight.copy_(torch.tensor([[1.0, 0.0], [0.0, 1.0], [2.0, 1.0]]))
        net.advantage.bias.copy_(torch.tensor([0.0, 0.0, -1.0]))
    # Wang et al. (2016), eq. 9: Q(s, a) = V(s) + A(s, a) - mean_a' A(s, a'), worked by hand.
    # s = (1, -2): hidden relu(1, 2.5) = (1, 2.5); V = 1 + 2.5 + 0.5 = 4; A = (1, 2.5, 3.5), mean 7/3;
    # Q = 4 + A - 7/3 = (8/3, 25/6, 31/6).
    # s = (-1, 1): hidden relu(-1, -0.5) = (0, 0); V = 0.5; A = (0, 0, -1), mean -1/3; Q = (5/6, 5/6, -1/6).
    q = learner.q_values(np.array([[1.0, -2.0], [-1.0, 1.0]]))
    np.testing.assert_allclose(q, [[8 / 3, 25 / 6, 31 / 6], [5 / 6, 5 / 6, -1 / 6]], rtol=1e-6)
    np.testing.assert_allclose(q.mean(axis=1), [4.0, 0.5], rtol=1e-6)  # mean over actions is V (eq. 9)


def test_dueling_weights_come_from_the_learner_seed():
    cfg = QNetConfig(hidden_sizes=[8, 8], head="dueling")
    box, actions = spaces.Box(-1.0, 1.0, (3,)), spaces.Discrete(4)
    a, b, c = (QNetLearner(box, actions, cfg, seed=s) for s in (3, 3, 4))
    _assert_same_tree(a.online.state_dict(), b.online.state_dict())
    assert not torch.equal(a.online.value.weight, c.online.value.weight)
    names = {name for name, _ in a.online.named_parameters()}
    assert {"value.weight", "advantage.bias", "shared.2.weight"} <= names


# --- prioritized replay in the learner ----------------------------------------------------------


def test_prioritized_update_weights_the_loss_and_sets_the_priorities():
    cfg = QNetConfig(hidden_sizes=[8], batch_size=6, warmup_steps=16, update_every=8, loss="squared",
                     replay_kind="prioritized", priority_exponent=0.7, priority_offset=0.01,
                     importance_exponent_start=0.2, importance_anneal_steps=40)
    learner, batch = _filled_learner(cfg)
    learner.learn(batch)  # 8 steps: warm-up, no update
    learner.learn(batch)  # step 16: a first update reprioritises some slots
    twin = deepcopy(learner)
    metrics = learner.learn(batch)  # step 24: the update checked
    # the same update by hand on the twin: store, draw the minibatch, squared TD loss weighted by
    # w_i = (N P(i))^-beta / max_j w_j (Schaul et al. 2016, sec. 3.4) with beta = 0.2 + 0.8 * 24 / 40
    twin.scaler.update(batch.obs)
    twin.replay.add(batch)
    priority = twin.replay.tree.leaves(np.arange(24))
    sample = twin.replay.sample(6, twin.rng)
    beta = 0.2 + 0.8 * 24 / 40
    p = priority[sample.index]
    w = (24 * p / priority.sum()) ** -beta
    w /= w.max()
    np.testing.assert_allclose(twin.replay.weights(sample.index, beta), w, rtol=1e-12)
    assert w.min() < 0.99  # the priorities differ, so does the correction
    with torch.no_grad():
        next_inputs = twin._inputs(sample.next_obs)
        boot = bootstrap_values(twin.online(next_inputs), twin.target(next_inputs), True).double().numpy()
        q = twin.online(twin._inputs(sample.obs)).double().numpy()[np.arange(6), sample.action]
    delta = sample.reward + sample.discount * boot - q
    assert metrics["td_loss"] == pytest.approx(np.mean(w * 0.5 * delta**2), rel=1e-5)
    # then the drawn slots get (|delta| + epsilon)^alpha (Schaul et al. 2016, sec. 3.3), the others keep theirs
    priority[sample.index] = (np.abs(delta) + 0.01) ** 0.7
    np.testing.assert_allclose(learner.replay.tree.leaves(np.arange(24)), priority, rtol=1e-5)


def test_importance_exponent_anneals_linearly_to_one():
    learner = QNetLearner(spaces.Box(-1.0, 1.0, (2,)), spaces.Discrete(2),
                          QNetConfig(importance_exponent_start=0.4, importance_anneal_steps=100), seed=0)
    # linear anneal beta_0 -> 1 (Schaul et al. 2016, sec. 3.4): 0.4 + 0.6 t / 100, then 1
    np.testing.assert_allclose(learner.importance_exponent(np.array([0, 50, 100, 250])), [0.4, 0.7, 1.0, 1.0])


@pytest.mark.parametrize("kind", ["uniform", "prioritized"])
def test_memory_estimate_is_the_replay_allocation(kind):
    cfg = QNetConfig(replay_capacity=300, batch_size=4, replay_kind=kind)
    box, actions = spaces.Box(-1.0, 1.0, (5,)), spaces.Discrete(3)
    n_bytes, name = QNetLearner.memory_bytes(cfg, box, actions)
    assert name == "replay_capacity" and n_bytes == QNetLearner(box, actions, cfg, seed=0).replay.nbytes


def _random_batches(n: int, copies: int, seed: int) -> list[Transitions]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        obs = rng.normal([0.5, -20.0], [1.0, 4.0], (copies, 2)).astype(np.float32)
        ended, coin = rng.random(copies) < 0.1, rng.random(copies) < 0.5
        next_obs = obs + rng.normal(0, 0.1, obs.shape).astype(np.float32)
        out.append(Transitions(obs, rng.integers(0, 3, copies), rng.normal(size=copies), next_obs, ended & coin,
                               ended & ~coin))
    return out


def test_prioritized_dueling_scaled_learner_resumes_exactly(tmp_path):
    box = spaces.Box(np.array([-1.0, -np.inf], np.float32), np.array([1.0, np.inf], np.float32))
    cfg = QNetConfig(hidden_sizes=[16, 16], batch_size=8, replay_capacity=120, warmup_steps=16, update_every=2,
                     target_update_every=5, n_step=3, head="dueling", replay_kind="prioritized",
                     importance_anneal_steps=200, epsilon=ScheduleConfig("linear", 1.0, 0.1, 100.0),
                     standardise_unbounded=True)  # the running moments are part of what resumes
    batches = _random_batches(40, 4, seed=9)
    full = QNetLearner(box, spaces.Discrete(3), cfg, seed=1)
    for batch in batches[:25]:  # 100 steps: the replay (120 slots, 30 rows of 4) has not wrapped yet
        full.act(batch.obs)
        full.learn(batch)
    save_checkpoint(tmp_path / "ckpt", {"learner": full.state_dict()})
    resumed = QNetLearner(box, spaces.Discrete(3), cfg, seed=12345)
    resumed.load_state_dict(load_checkpoint(tmp_path / "ckpt")["learner"])
    for batch in batches[25:]:  # 60 more steps: wraps, reprioritises, anneals beta
        np.testing.assert_array_equal(resumed.act(batch.obs), full.act(batch.obs))
        assert resumed.learn(batch) == full.learn(batch)
    assert full.updates > 20 and full.replay.filled_rows == full.replay.rows
    _assert_same_tree(full.state_dict(), resumed.state_dict())


def test_states_that_miss_scaler_or_priorities_are_refused():
    box, actions = spaces.Box(-1.0, 1.0, (2,)), spaces.Discrete(2)
    unscaled = QNetLearner(box, actions, QNetConfig(scale_inputs=False), seed=0)
    with pytest.raises(ValueError, match=r"has no input-scaler statistics \('scaler'\).*scale_inputs=True"):
        QNetLearner(box, actions, QNetConfig(), seed=0).load_state_dict(unscaled.state_dict())
    uniform = QNetLearner(box, actions, QNetConfig(replay_kind="uniform"), seed=0)
    with pytest.raises(ValueError, match=r"no \['priority', 'max_priority'\] entries"):
        QNetLearner(box, actions, QNetConfig(replay_kind="prioritized"), seed=0).load_state_dict(uniform.state_dict())


@pytest.mark.parametrize(
    ("key", "value", "choices"),
    [("replay_kind", "ranked", r"\['uniform', 'prioritized'\]"), ("head", "duel", r"\['plain', 'dueling'\]")],
)
def test_bad_replay_kind_or_head_names_the_key_and_the_choices(key, value, choices):
    with pytest.raises(ValueError, match=rf"{key} must be one of {choices}, got '{value}'"):
        QNetConfig(**{key: value})
    box, actions = spaces.Box(-1.0, 1.0, (2,)), spaces.Discrete(2)
    with pytest.raises(ValueError, match=rf"{key} must be one of {choices}"):  # through the hydra schema as well
        build_learner("qnet", {key: value}, box, actions, seed=0)
