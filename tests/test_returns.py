"""Discounted returns against independent references."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.signal import lfilter

from qlab.returns import discounted_return, returns_to_go


def lfilter_returns_to_go(rewards: np.ndarray, gamma: float) -> np.ndarray:
    # scipy.signal.lfilter: G[t] = r[t] + gamma * G[t+1] is the IIR filter 1 / (1 - gamma z^-1) run backwards.
    return lfilter([1.0], [1.0, -gamma], rewards[::-1])[::-1]


@given(
    rewards=st.lists(st.floats(-10, 10), min_size=1, max_size=60),
    gamma=st.floats(0.0, 1.0),
)
def test_discounted_return_matches_lfilter(rewards, gamma):
    r = np.array(rewards)
    expected = lfilter_returns_to_go(r, gamma)
    np.testing.assert_allclose(discounted_return(r, gamma), expected[0], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(returns_to_go(r, gamma), expected, rtol=1e-9, atol=1e-9)


def test_batched_rows_with_lengths_match_lfilter():
    rng = np.random.default_rng(0)
    rewards = rng.normal(size=(7, 40))
    lengths = rng.integers(1, 41, size=7)
    got = discounted_return(rewards, 0.95, lengths)
    for i in range(7):
        # scipy.signal.lfilter on each episode's own rewards
        assert got[i] == pytest.approx(lfilter_returns_to_go(rewards[i, : lengths[i]], 0.95)[0], rel=1e-12)


def test_constant_reward_tends_to_geometric_limit():
    # 1 / (1 - 0.9) = 10 (geometric series; common practice, no source)
    assert discounted_return(np.ones(2000), 0.9) == pytest.approx(10.0, rel=1e-12)


def test_gamma_outside_unit_interval_is_rejected():
    with pytest.raises(ValueError, match="gamma"):
        discounted_return(np.ones(3), 1.5)
