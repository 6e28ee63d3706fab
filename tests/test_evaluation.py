"""Batched greedy evaluation against the same episodes run one gymnasium environment at a time."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

import qlab  # noqa: F401  (registers the qlab tasks)
from qlab.copies import make_copies
from qlab.evaluation import evaluate
from qlab.learners import Learner, Transitions
from qlab.learners.qnet import QNetConfig, QNetLearner
from qlab.learners.schedules import ScheduleConfig
from qlab.learners.tabular import TabularConfig, TabularQ

GAMMA = 0.95
SEEDS = [11, 12, 13, 14, 15, 16]
DOCK = {"start_distance_m": (5.0, 10.0), "max_steps": 60}
CARTPOLE_LOW, CARTPOLE_HIGH = [-2.4, -3.0, -0.21, -3.0], [2.4, 3.0, 0.21, 3.0]


def one_at_a_time(learner: Learner, env: gym.Env, start_seeds: list[int], gamma: float) -> dict[str, float]:
    """The scores of qlab.experiment.evaluate before batching: one gymnasium episode after another,
    ``env.reset(seed=s)`` then ``env.step`` with the greedy action until terminated or truncated."""
    success, disc, undisc, length, q_start, trained = [], [], [], [], [], []
    for s in start_seeds:
        obs, _ = env.reset(seed=s)
        q_start.append(float(learner.value(np.asarray(obs, dtype=np.float32)[None])[0]))
        done, t, g, g_trained, total, ok = False, 0, 0.0, 0.0, 0.0, False
        while not done:
            action = learner.greedy(np.asarray(obs, dtype=np.float32)[None])[0]
            obs, reward, terminated, truncated, info = env.step(action)
            base = float(info.get("base_reward", reward))
            g += gamma**t * base
            g_trained += gamma**t * float(reward)
            total += base
            ok = bool(info.get("success", False))
            t += 1
            done = terminated or truncated
        success.append(ok)
        disc.append(g)
        trained.append(g_trained)
        undisc.append(total)
        length.append(t)
    return {
        "success": float(np.mean(success)),
        "discounted_return": float(np.mean(disc)),
        "return": float(np.mean(undisc)),
        "length": float(np.mean(length)),
        "q_start": float(np.mean(q_start)),
        "trained_discounted_return": float(np.mean(trained)),
    }


def train(learner: Learner, env: gym.Env, steps: int, seed: int) -> None:
    """A few hundred exploring steps, one environment step at a time."""
    obs, _ = env.reset(seed=seed)
    for _ in range(steps):
        action = learner.act(np.asarray(obs, dtype=np.float32)[None])[0]
        next_obs, reward, terminated, truncated, _ = env.step(action)
        learner.learn(Transitions.single(obs, action, reward, next_obs, terminated, truncated))
        obs = env.reset()[0] if terminated or truncated else next_obs


@pytest.mark.parametrize(
    ("noise", "shaping"), [(0.0, "none"), (0.05, "none"), (0.05, "potential"), (0.0, "progress")]
)
def test_batched_equals_one_at_a_time_on_dock_with_a_table(noise, shaping):
    params = {**DOCK, "velocity_noise_m_s": noise}
    env = gym.make("qlab/Dock-v0", shaping=shaping, gamma=GAMMA, **params)
    config = TabularConfig(gamma=GAMMA, bins=[12], epsilon=ScheduleConfig("constant", 0.3),
                           step_size=ScheduleConfig("constant", 0.5))
    learner = TabularQ(env.observation_space, env.action_space, config, seed=0)
    train(learner, env, 400, seed=2)
    expected = one_at_a_time(learner, env, SEEDS, GAMMA)
    copies = make_copies(lambda: gym.make("qlab/Dock-v0", **params), len(SEEDS), shaping, GAMMA)
    assert evaluate(learner, copies, SEEDS, GAMMA) == expected
    assert expected["length"] % 1 != 0  # episodes of different lengths: copies finish at different steps


def test_batched_equals_one_at_a_time_on_cartpole_with_a_table():
    env = gym.make("CartPole-v1")
    config = TabularConfig(gamma=GAMMA, bins=[4], low=CARTPOLE_LOW, high=CARTPOLE_HIGH,
                           epsilon=ScheduleConfig("constant", 0.5), step_size=ScheduleConfig("constant", 0.5))
    learner = TabularQ(env.observation_space, env.action_space, config, seed=0)
    train(learner, env, 400, seed=2)
    expected = one_at_a_time(learner, env, SEEDS, GAMMA)
    assert evaluate(learner, make_copies(lambda: gym.make("CartPole-v1"), len(SEEDS)), SEEDS, GAMMA) == expected


@pytest.mark.parametrize("task", ["CartPole-v1", "qlab/Dock-v0"])
def test_batched_matches_one_at_a_time_with_a_q_network(task):
    # float32 matrix products over a batch round differently from one row: equal to float tolerance
    make = (lambda: gym.make(task)) if task == "CartPole-v1" else (lambda: gym.make(task, **DOCK))
    env = make()
    learner = QNetLearner(env.observation_space, env.action_space, QNetConfig(hidden_sizes=[16]), seed=3)
    expected = one_at_a_time(learner, env, SEEDS, GAMMA)
    got = evaluate(learner, make_copies(make, len(SEEDS)), SEEDS, GAMMA)
    assert got.keys() == expected.keys()
    for key, value in expected.items():
        assert got[key] == pytest.approx(value, rel=1e-6, abs=1e-9), key


def test_one_copy_per_start_seed():
    copies = make_copies(lambda: gym.make("CartPole-v1"), 3)
    env = gym.make("CartPole-v1")
    learner = QNetLearner(env.observation_space, env.action_space, QNetConfig(hidden_sizes=[4]), seed=0)
    with pytest.raises(ValueError, match=r"one copy per start seed \(2\), got 3 copies"):
        evaluate(learner, copies, [1, 2], GAMMA)
