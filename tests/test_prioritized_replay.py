"""Sum tree and prioritized replay: proportional sampling, importance weights, n-step tuples, exact resume."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.learners.prioritized import PrioritizedReplay
from qlab.learners.protocol import Transitions
from qlab.learners.replay import ReplayBuffer
from qlab.learners.sumtree import SumTree

SAMPLE_FIELDS = ("index", "obs", "action", "reward", "next_obs", "discount")

# --- sum tree ---------------------------------------------------------------------------------


def test_sampling_frequencies_are_proportional_to_priorities():
    tree = SumTree(10)  # 10 leaves padded to 16: the padding must never be drawn
    priority = np.array([1.0, 2.0, 0.5, 4.0, 3.0, 1.5, 2.5, 0.25, 5.0, 1.0])
    tree.update(np.arange(10), priority)
    draws = 20_000
    leaf = tree.find(np.random.default_rng(5).random(draws) * tree.total)
    assert leaf.min() >= 0 and leaf.max() < 10
    counts = np.bincount(leaf, minlength=10)
    # Pearson chi-square goodness of fit to P(i) = p_i / sum p (scipy.stats.chisquare)
    assert scipy.stats.chisquare(counts, draws * priority / priority.sum()).pvalue > 0.01


def test_zero_priority_leaves_are_never_drawn():
    tree = SumTree(7)
    tree.update(np.arange(7), [0.0, 3.0, 0.0, 0.0, 1.0, 0.0, 0.0])
    leaf = tree.find(np.random.default_rng(0).random(5_000) * tree.total)
    assert set(np.unique(leaf)) == {1, 4}
    assert tree.find(np.array([tree.total]))[0] == 4  # mass rounded up to the total: last positive leaf


def test_search_matches_the_cumulative_sum():
    # Integer priorities keep every partial sum exact, so the leaf holding mass m is the k with
    # cumsum[k-1] <= m < cumsum[k] (numpy.cumsum, numpy.searchsorted with side="right").
    rng = np.random.default_rng(1)
    priority = rng.integers(0, 6, 37).astype(np.float64)
    tree = SumTree(37)
    tree.update(np.arange(37), priority)
    mass = np.concatenate([rng.random(500) * priority.sum(), np.cumsum(priority)])  # boundaries too
    mass = mass[mass < priority.sum()]
    expected = np.searchsorted(np.cumsum(priority), mass, side="right")
    np.testing.assert_array_equal(tree.find(mass), expected)


def test_total_and_every_node_stay_sums_under_batched_updates():
    rng = np.random.default_rng(2)
    tree = SumTree(50)
    leaves = np.zeros(50)
    for _ in range(30):
        index = rng.integers(0, 50, 16)  # repeats within a batch are likely
        value = rng.exponential(size=16)
        tree.update(index, value)
        for i, v in zip(index, value, strict=True):  # the documented rule, one at a time: the last value wins
            leaves[i] = v
        np.testing.assert_array_equal(tree.leaves(np.arange(50)), leaves)
        assert tree.total == pytest.approx(np.sum(leaves), rel=1e-12)  # numpy.sum
        parents = np.arange(1, tree.size)
        np.testing.assert_array_equal(tree.nodes[parents], tree.nodes[2 * parents] + tree.nodes[2 * parents + 1])


def test_repeated_index_in_one_batch_keeps_its_last_value():
    tree = SumTree(8)
    tree.update(np.array([3, 5, 3, 3]), np.array([1.0, 2.0, 7.0, 4.0]))
    assert tree.leaves(np.array([3, 5])).tolist() == [4.0, 2.0]
    assert tree.total == 6.0


def test_rebuild_from_leaves_is_bitwise_the_incremental_tree():
    rng = np.random.default_rng(3)
    tree = SumTree(21)
    for _ in range(10):
        tree.update(rng.integers(0, 21, 5), rng.random(5) * 1e3)
    other = SumTree(21)
    other.rebuild(tree.leaves(np.arange(21)))
    np.testing.assert_array_equal(other.nodes, tree.nodes)


def test_one_leaf_tree_and_bad_input():
    tree = SumTree(1)
    tree.update(np.array([0]), 2.5)
    assert tree.total == 2.5 and tree.find(np.array([0.0, 2.4])).tolist() == [0, 0]
    assert SumTree.bytes_for(1) == tree.nbytes and SumTree.bytes_for(1000) == SumTree(1000).nbytes == 2 * 1024 * 8
    with pytest.raises(ValueError, match="all zero"):
        SumTree(4).find(np.array([0.0]))
    with pytest.raises(ValueError, match="finite numbers >= 0"):
        tree.update(np.array([0]), np.nan)
    with pytest.raises(ValueError, match=r"leaf indices must lie in \[0, 1\)"):
        tree.update(np.array([1]), 1.0)


# --- prioritized replay -----------------------------------------------------------------------


def _step(t: int, streams: int, ended: np.ndarray) -> Transitions:
    """Step t of `streams` copies: obs [10 t + col], next obs [10 (t + 1) + col]."""
    col = np.arange(streams)
    return Transitions(
        obs=(10.0 * t + col).astype(np.float32)[:, None],
        action=(t + col) % 3,
        reward=np.sin(t + 0.3 * col),
        next_obs=(10.0 * (t + 1) + col).astype(np.float32)[:, None],
        terminated=ended & (col % 2 == 0),
        truncated=ended & (col % 2 == 1),
    )


def _fill(buffers: list[ReplayBuffer], steps: int, streams: int = 3, start: int = 0) -> None:
    for t in range(start, start + steps):
        batch = _step(t, streams, np.array([t % 5 == 4, t % 7 == 6, False]))
        for buffer in buffers:
            buffer.add(batch)


def test_n_step_tuples_are_the_uniform_replays():
    uniform = ReplayBuffer(capacity=31, obs_dim=1, gamma=0.9, n_step=4)
    prioritized = PrioritizedReplay(capacity=31, obs_dim=1, gamma=0.9, n_step=4)
    _fill([uniform, prioritized], 25)  # 10 rows of 3 streams: wrapped, incomplete tuples at the newest rows
    everything = np.arange(len(uniform))
    for name in SAMPLE_FIELDS:
        np.testing.assert_array_equal(getattr(prioritized.gather(everything), name),
                                      getattr(uniform.gather(everything), name))
    prioritized.set_priorities(everything, np.random.default_rng(0).normal(size=everything.size))
    drawn = prioritized.sample(200, np.random.default_rng(1))
    assert len(np.unique(drawn.index)) > 20 and drawn.index.max() < len(uniform)
    expected = uniform.gather(drawn.index)
    for name in SAMPLE_FIELDS:
        np.testing.assert_array_equal(getattr(drawn, name), getattr(expected, name))


def test_replay_samples_in_proportion_to_priority():
    buf = PrioritizedReplay(capacity=12, obs_dim=1, gamma=0.9, exponent=0.7, offset=0.1)
    _fill([buf], 4)  # 12 slots
    td = np.linspace(-2.0, 3.0, 12)
    buf.set_priorities(np.arange(12), td)
    p = (np.abs(td) + 0.1) ** 0.7  # Schaul et al. (2016), sec. 3.3, eq. 1 with p_i = |delta_i| + epsilon
    counts = np.bincount(buf.sample(20_000, np.random.default_rng(4)).index, minlength=12)
    assert scipy.stats.chisquare(counts, 20_000 * p / p.sum()).pvalue > 0.01  # scipy.stats.chisquare


def test_importance_weights_hand_worked():
    # Schaul et al. (2016), sec. 3.4: w_i = (N P(i))^-beta / max_j w_j, with P(i) from eq. 1.
    # alpha = 0.5, epsilon = 1, TD errors 0, 0, -3, 15: p = (|delta| + 1)^0.5 = 1, 1, 2, 4, sum 8,
    # P = 1/8, 1/8, 1/4, 1/2; N = 4: N P = 0.5, 0.5, 1, 2; beta = 0.5: (N P)^-0.5 = sqrt 2, sqrt 2, 1, 1/sqrt 2.
    # Minibatch of slots 0, 2, 3 (max weight sqrt 2): w = 1, 1/sqrt 2, 1/2.
    buf = PrioritizedReplay(capacity=4, obs_dim=1, gamma=0.9, exponent=0.5, offset=1.0)
    for t in range(2):
        buf.add(_step(t, 2, np.zeros(2, bool)))
    buf.set_priorities(np.arange(4), np.array([0.0, 0.0, -3.0, 15.0]))
    np.testing.assert_allclose(buf.tree.leaves(np.arange(4)), [1.0, 1.0, 2.0, 4.0], rtol=1e-15)
    np.testing.assert_allclose(buf.weights(np.array([0, 2, 3]), 0.5), [1.0, 1 / np.sqrt(2), 0.5], rtol=1e-12)
    np.testing.assert_allclose(buf.weights(np.array([2, 3]), 0.5), [1.0, 1 / np.sqrt(2)], rtol=1e-12)
    np.testing.assert_allclose(buf.weights(np.array([0, 3]), 1.0), [1.0, 0.25], rtol=1e-12)  # (N P)^-1: 2, 1/2
    np.testing.assert_array_equal(buf.weights(np.array([0, 3]), 0.0), [1.0, 1.0])  # beta 0: no correction


def test_new_transitions_enter_at_the_largest_priority_given():
    buf = PrioritizedReplay(capacity=6, obs_dim=1, gamma=0.9, exponent=1.0, offset=0.5)
    _fill([buf], 1)
    # before any TD error: priority 1 (Schaul et al. 2016, Algorithm 1, line 6: p_1 = 1)
    np.testing.assert_array_equal(buf.tree.leaves(np.arange(3)), [1.0, 1.0, 1.0])
    buf.set_priorities(np.array([0, 1]), np.array([4.5, -0.2]))  # priorities 5.0 and 0.7
    assert buf.max_priority == 5.0
    buf.set_priorities(np.array([0]), np.array([0.0]))  # lowered again: the largest given so far stays 5
    _fill([buf], 1, start=1)
    np.testing.assert_array_equal(buf.tree.leaves(np.arange(6)), [0.5, 0.7, 1.0, 5.0, 5.0, 5.0])
    _fill([buf], 1, start=2)  # wraps onto row 0: the overwritten slots start afresh at the max
    np.testing.assert_array_equal(buf.tree.leaves(np.arange(3)), [5.0, 5.0, 5.0])
    assert buf.tree.total == pytest.approx(30.0)


def test_memory_counts_the_sum_tree():
    uniform = ReplayBuffer(capacity=100, obs_dim=4, gamma=0.9)
    prioritized = PrioritizedReplay(capacity=100, obs_dim=4, gamma=0.9)
    assert prioritized.nbytes == uniform.nbytes + 2 * 128 * 8  # 128 leaves (next power of two), float64 nodes


def test_state_round_trip_through_a_checkpoint_gives_identical_samples(tmp_path):
    buf = PrioritizedReplay(capacity=20, obs_dim=1, gamma=0.9, n_step=3, exponent=0.6, offset=1e-3)
    _fill([buf], 9)  # wrapped
    rng = np.random.default_rng(7)
    buf.set_priorities(rng.integers(0, len(buf), 10), rng.normal(size=10))
    save_checkpoint(tmp_path / "replay", {"replay": buf.state_dict()})
    other = PrioritizedReplay(capacity=20, obs_dim=1, gamma=0.9, n_step=3, exponent=0.6, offset=1e-3)
    other.load_state_dict(load_checkpoint(tmp_path / "replay")["replay"])
    np.testing.assert_array_equal(other.tree.nodes, buf.tree.nodes)
    for _ in range(3):  # sample, reprioritise, add: both stay in step
        a, b = buf.sample(16, np.random.default_rng(8)), other.sample(16, np.random.default_rng(8))
        for name in SAMPLE_FIELDS:
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
        np.testing.assert_array_equal(buf.weights(a.index, 0.7), other.weights(b.index, 0.7))
        buf.set_priorities(a.index, a.reward)
        other.set_priorities(b.index, b.reward)
        _fill([buf, other], 1, start=20)
    assert other.max_priority == buf.max_priority


def test_a_uniform_state_is_refused_naming_the_missing_entries():
    uniform = ReplayBuffer(capacity=6, obs_dim=1, gamma=0.9)
    _fill([uniform], 2)
    with pytest.raises(ValueError, match=r"no \['priority', 'max_priority'\] entries"):
        PrioritizedReplay(capacity=6, obs_dim=1, gamma=0.9).load_state_dict(uniform.state_dict())


@pytest.mark.parametrize(("kwargs", "name"), [({"exponent": -0.1}, "exponent"), ({"offset": 0.0}, "offset")])
def test_bad_settings_raise(kwargs, name):
    with pytest.raises(ValueError, match=name):
        PrioritizedReplay(capacity=4, obs_dim=1, gamma=0.9, **kwargs)
