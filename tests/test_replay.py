"""Replay memory: n-step sums against hand-worked values and scipy, episode cuts, uniform sampling."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from qlab.learners.protocol import Transitions
from qlab.learners.replay import ReplayBuffer


def _batch(obs, action, reward, next_obs, terminated, truncated) -> Transitions:
    return Transitions(
        obs=np.asarray(obs, dtype=np.float32).reshape(len(reward), -1),
        action=np.asarray(action, dtype=np.int64),
        reward=np.asarray(reward, dtype=np.float64),
        next_obs=np.asarray(next_obs, dtype=np.float32).reshape(len(reward), -1),
        terminated=np.asarray(terminated, dtype=bool),
        truncated=np.asarray(truncated, dtype=bool),
    )


def _fill(buffer: ReplayBuffer, rewards, terminated=None, truncated=None) -> None:
    """One stream; observation t is [t], next observation [t + 1] (so bootstrap slots are readable)."""
    n = len(rewards)
    terminated = np.zeros(n, bool) if terminated is None else np.asarray(terminated)
    truncated = np.zeros(n, bool) if truncated is None else np.asarray(truncated)
    for t in range(n):
        buffer.add(_batch([t], [t % 3], [rewards[t]], [t + 1], [terminated[t]], [truncated[t]]))


def test_hand_worked_two_step_sums_and_episode_ends():
    # Hand-worked: rewards 1, 2, 3 with gamma 0.5 and n = 2, using the n-step return
    # sum_{k<n} gamma^k r[t+k] + gamma^n V(s[t+n]) of Sutton & Barto (2018), eq. 7.1 (from memory).
    for end in ("terminated", "truncated"):
        buf = ReplayBuffer(capacity=10, obs_dim=1, gamma=0.5, n_step=2)
        flags = {end: [False, False, True]}
        _fill(buf, [1.0, 2.0, 3.0], **flags)
        s = buf.gather(np.array([0, 1, 2]))
        np.testing.assert_allclose(s.reward, [1 + 0.5 * 2, 2 + 0.5 * 3, 3])
        np.testing.assert_array_equal(s.next_obs[:, 0], [2, 3, 3])
        if end == "terminated":  # no bootstrap after a termination
            np.testing.assert_allclose(s.discount, [0.25, 0.0, 0.0])
        else:  # a truncation bootstraps from its own next_obs
            np.testing.assert_allclose(s.discount, [0.25, 0.25, 0.5])
        np.testing.assert_array_equal(s.obs[:, 0], [0, 1, 2])
        np.testing.assert_array_equal(s.action, [0, 1, 2])


@pytest.mark.parametrize("n_step", [1, 3, 7])
def test_n_step_sums_match_lfilter_returns(n_step):
    gamma = 0.9
    rng = np.random.default_rng(3)
    rewards = rng.normal(size=40)
    buf = ReplayBuffer(capacity=64, obs_dim=1, gamma=gamma, n_step=n_step)
    terminated = np.zeros(40, bool)
    terminated[-1] = True
    _fill(buf, rewards, terminated)
    # Discounted returns-to-go G[t] by the linear filter y[t] = x[t] + gamma y[t-1] on the reversed
    # rewards (scipy.signal.lfilter); the n-step sum is G[t] - gamma^n G[t+n] (G = 0 past the end).
    G = scipy.signal.lfilter([1.0], [1.0, -gamma], rewards[::-1])[::-1]
    G_ahead = np.concatenate([G, np.zeros(n_step)])[n_step:]
    s = buf.gather(np.arange(40))
    np.testing.assert_allclose(s.reward, G - gamma**n_step * G_ahead, rtol=1e-12, atol=1e-12)
    t = np.arange(40)
    reaches_end = t + n_step >= 40
    np.testing.assert_allclose(s.discount, np.where(reaches_end, 0.0, gamma**n_step))
    np.testing.assert_array_equal(s.next_obs[:, 0], np.minimum(t + n_step, 40))


def test_truncated_episode_bootstraps_and_never_crosses_into_the_next():
    gamma, n = 0.9, 4
    rewards = np.arange(1.0, 9.0)  # episode 1: steps 0-2 (truncated), episode 2: steps 3-7 (terminated)
    truncated = np.zeros(8, bool)
    truncated[2] = True
    terminated = np.zeros(8, bool)
    terminated[7] = True
    buf = ReplayBuffer(capacity=16, obs_dim=1, gamma=gamma, n_step=n)
    _fill(buf, rewards, terminated, truncated)
    s = buf.gather(np.arange(8))
    # scipy.signal.lfilter per episode: returns-to-go of each episode separately
    G1 = scipy.signal.lfilter([1.0], [1.0, -gamma], rewards[:3][::-1])[::-1]
    np.testing.assert_allclose(s.reward[:3], G1)  # cut at the truncation, not summed into episode 2
    np.testing.assert_allclose(s.discount[:3], gamma ** np.array([3, 2, 1]))  # bootstrap through truncation
    np.testing.assert_array_equal(s.next_obs[:3, 0], [3, 3, 3])  # from the truncation's next_obs
    G2 = scipy.signal.lfilter([1.0], [1.0, -gamma], rewards[3:][::-1])[::-1]
    G2_ahead = np.concatenate([G2, np.zeros(n)])[n:]
    np.testing.assert_allclose(s.reward[3:], G2 - gamma**n * G2_ahead)
    np.testing.assert_allclose(s.discount[3:], [gamma**n, 0, 0, 0, 0])


def test_n_step_stops_at_the_newest_transition():
    gamma = 0.8
    buf = ReplayBuffer(capacity=16, obs_dim=1, gamma=gamma, n_step=5)
    _fill(buf, [1.0, 1.0, 1.0])  # episode still running
    s = buf.gather(np.array([0, 1, 2]))
    # geometric partial sums 1 + 0.8 + 0.64 ... (common practice, no source)
    np.testing.assert_allclose(s.reward, [1 + 0.8 + 0.64, 1 + 0.8, 1])
    np.testing.assert_allclose(s.discount, [gamma**3, gamma**2, gamma])
    np.testing.assert_array_equal(s.next_obs[:, 0], [3, 3, 3])


def test_wraparound_keeps_time_order():
    gamma, n = 0.5, 3
    buf = ReplayBuffer(capacity=5, obs_dim=1, gamma=gamma, n_step=n)
    rewards = np.arange(8.0)
    _fill(buf, rewards)  # slots now hold steps 5, 6, 7, 3, 4
    assert len(buf) == 5
    s = buf.gather(np.arange(5))
    step = s.obs[:, 0].astype(int)
    np.testing.assert_array_equal(step, [5, 6, 7, 3, 4])
    horizon = np.minimum(step + n, 8)
    expected = [sum(gamma**k * rewards[t + k] for k in range(h - t)) for t, h in zip(step, horizon, strict=True)]
    np.testing.assert_allclose(s.reward, expected)
    np.testing.assert_array_equal(s.next_obs[:, 0], horizon)


def test_parallel_streams_sum_within_their_own_stream():
    gamma, n = 0.9, 2
    buf = ReplayBuffer(capacity=12, obs_dim=1, gamma=gamma, n_step=n)
    for t in range(3):  # two copies stepped together; copy 1 terminates at t = 0
        buf.add(_batch([10 * t, 10 * t + 1], [0, 1], [t, 100 + t], [10 * t + 10, 10 * t + 11],
                       [False, t == 0], [False, False]))
    s = buf.gather(np.array([0, 1, 3]))  # (t=0, copy 0), (t=0, copy 1), (t=1, copy 1)
    np.testing.assert_allclose(s.reward, [0 + gamma * 1, 100, 101 + gamma * 102])
    np.testing.assert_allclose(s.discount, [gamma**2, 0.0, gamma**2])
    with pytest.raises(ValueError, match="one per stream"):
        buf.add(_batch([0], [0], [0.0], [0], [False], [False]))


def test_sampling_is_uniform_over_stored_slots():
    buf = ReplayBuffer(capacity=50, obs_dim=1, gamma=0.9)
    _fill(buf, np.zeros(30))
    idx = buf.sample(30_000, np.random.default_rng(11)).index
    assert idx.min() >= 0 and idx.max() < 30  # only filled slots
    counts = np.bincount(idx, minlength=30)
    # Pearson chi-square goodness of fit to the uniform law (scipy.stats.chisquare)
    assert scipy.stats.chisquare(counts).pvalue > 0.01
    _fill(buf, np.zeros(40))  # wrapped: all 50 slots live
    counts = np.bincount(buf.sample(50_000, np.random.default_rng(12)).index, minlength=50)
    assert scipy.stats.chisquare(counts).pvalue > 0.01


def test_memory_is_the_raw_transitions():
    buf = ReplayBuffer(capacity=1000, obs_dim=4, gamma=0.99)
    raw_per_transition = 2 * 4 * 4 + 8 + 8 + 1 + 1  # obs + next_obs float32, action int64, reward float64, 2 flags
    assert buf.nbytes == 1000 * raw_per_transition


def test_state_round_trip_preserves_samples():
    buf = ReplayBuffer(capacity=8, obs_dim=1, gamma=0.9, n_step=3)
    _fill(buf, np.arange(11.0), terminated=np.arange(11) == 6)
    other = ReplayBuffer(capacity=8, obs_dim=1, gamma=0.9, n_step=3)
    other.load_state_dict(buf.state_dict())
    a, b = buf.sample(20, np.random.default_rng(0)), other.sample(20, np.random.default_rng(0))
    for field in ("index", "obs", "action", "reward", "next_obs", "discount"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [({"capacity": 0}, "capacity"), ({"obs_dim": 0}, "obs_dim"), ({"gamma": 1.5}, "gamma"), ({"n_step": 0}, "n_step")],
)
def test_bad_settings_raise(kwargs, name):
    settings = {"capacity": 10, "obs_dim": 2, "gamma": 0.9, "n_step": 1, **kwargs}
    with pytest.raises(ValueError, match=name):
        ReplayBuffer(**settings)
