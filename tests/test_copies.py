"""Copies of a task stepped as one batch: saved and restored batches, gymnasium vector copies, the factory."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

import qlab  # noqa: F401  (registers the qlab tasks)
from qlab.checkpoint import load_checkpoint, save_checkpoint
from qlab.copies import VectorCopies, make_copies
from qlab.tasks.batch import CopyStreams, TaskBatch

NOISY_DOCK = {"velocity_noise_m_s": 0.1, "start_distance_m": (3.0, 6.0), "max_steps": 12}


def drive(batch: TaskBatch, rng: np.random.Generator, steps: int) -> list[tuple]:
    """Random actions on random subsets of the running copies, ended copies reset with drawn seeds."""
    record = []
    for _ in range(steps):
        ended = batch.done.copy()
        if ended.any():
            batch.reset(ended, rng.integers(0, 2**31, int(ended.sum())))
        active = rng.random(batch.n) < 0.8
        if active.any():
            step = batch.step(rng.integers(0, 5, int(active.sum())), active)
            record.append((active, step.next_obs, step.reward, step.terminated, step.truncated))
    return record


def test_restored_batch_continues_exactly(tmp_path):
    # state_dict -> save_checkpoint (numpy arrays and JSON only) -> load_checkpoint -> load_state_dict
    make = lambda: TaskBatch(gym.make("qlab/Dock-v0", **NOISY_DOCK).unwrapped, 5, "potential", 0.9)  # noqa: E731
    original = make()
    original.reset(None, np.arange(5))
    drive(original, np.random.default_rng(0), 30)
    saved = original.state_dict()
    save_checkpoint(tmp_path / "ck", {"copies": saved})
    continued = drive(original, np.random.default_rng(1), 40)  # must not alter the state saved before
    for state in (saved, load_checkpoint(tmp_path / "ck")["copies"]):
        restored = make()
        restored.load_state_dict(state)
        again = drive(restored, np.random.default_rng(1), 40)
        assert len(again) == len(continued)
        for a, b in zip(again, continued, strict=True):
            for x, y in zip(a, b, strict=True):
                np.testing.assert_array_equal(x, y)
    assert {"pcg64_state", "pcg64_inc"} <= set(saved) and saved["pcg64_state"].dtype == np.uint64


def test_batch_refuses_misuse():
    batch = TaskBatch(gym.make("qlab/Dock-v0").unwrapped, 3)
    with pytest.raises(RuntimeError, match="reset"):
        batch.step(np.zeros(3, dtype=np.int64))
    with pytest.raises(RuntimeError, match="reset every copy"):
        batch.state_dict()
    with pytest.raises(ValueError, match=r"one integer seed per selected copy \(2\)"):
        batch.reset(np.array([True, False, True]), [1])
    batch.reset(np.array([True, False, True]), [1, 2])
    with pytest.raises(RuntimeError, match="no running episode"):
        batch.step(np.zeros(3, dtype=np.int64))  # copy 1 never started
    with pytest.raises(ValueError, match=r"one action per active copy \(2\)"):
        batch.step(np.zeros(3, dtype=np.int64), np.array([True, False, True]))
    with pytest.raises(ValueError, match="boolean arrays of shape"):
        batch.step(np.zeros(2, dtype=np.int64), np.array([1, 0, 1]))
    with pytest.raises(ValueError, match=r"size \(N, \.\.\.\) with N = 2"):
        CopyStreams([np.random.default_rng(0)] * 2).uniform(size=3)


def cartpole() -> gym.Env:
    return gym.make("CartPole-v1", max_episode_steps=15)  # short cap: episodes end by termination and truncation


def test_vector_copies_repeat_single_envs_and_never_cross_episodes():
    n = 4
    copies = make_copies(cartpole, n)
    assert isinstance(copies, VectorCopies) and not copies.savable
    singles = [cartpole() for _ in range(n)]
    rng = np.random.default_rng(3)
    last_next = [None] * n
    ends = {"terminated": 0, "truncated": 0}
    which = np.ones(n, dtype=bool)
    for _ in range(120):
        if which.any():
            seeds = rng.integers(0, 2**31, int(which.sum()))
            obs = copies.reset(which, seeds)
            for i, s in zip(np.flatnonzero(which), seeds, strict=True):
                # gymnasium: gym.make("CartPole-v1").reset(seed=s)
                np.testing.assert_array_equal(obs[i], singles[i].reset(seed=int(s))[0])
                last_next[i] = obs[i]
        active = ~copies.done & (rng.random(n) < 0.75)  # all copies (vector step) or some (one by one)
        if active.any():
            actions = rng.integers(0, 2, size=n)
            step = copies.step(actions[active], active)
            for k, i in enumerate(np.flatnonzero(active)):
                obs, reward, terminated, truncated, _ = singles[i].step(int(actions[i]))
                np.testing.assert_array_equal(step.obs[k], last_next[i])  # continues its own episode
                np.testing.assert_array_equal(step.next_obs[k], obs)
                assert (step.reward[k], step.base_reward[k]) == (reward, reward)
                assert (step.terminated[k], step.truncated[k]) == (terminated, truncated and not terminated)
                assert not step.success[k]  # CartPole reports no success
                last_next[i] = step.next_obs[k]
            ends["terminated"] += int(step.terminated.sum())
            ends["truncated"] += int(step.truncated.sum())
        which = copies.done & (rng.random(n) < 0.6)  # ended copies wait a while before their next episode
    assert min(ends.values()) > 0  # both endings were exercised


def test_vector_copies_refuse_shaping_and_saving():
    with pytest.raises(ValueError, match="shaping 'potential'"):
        make_copies(cartpole, 2, "potential")
    copies = make_copies(cartpole, 2)
    with pytest.raises(NotImplementedError, match="cannot be saved"):
        copies.state_dict()
    with pytest.raises(RuntimeError, match="reset"):
        copies.observe()


def test_factory_picks_the_batch_for_qlab_tasks():
    copies = make_copies(lambda: gym.make("qlab/Dock-v0", **NOISY_DOCK), 3, "progress", 0.9, 0.05)
    assert isinstance(copies, TaskBatch) and copies.savable
    assert (copies.shaping, copies.gamma, copies.progress_scale) == ("progress", 0.9, 0.05)
    assert copies.observation_space == gym.make("qlab/Dock-v0", **NOISY_DOCK).observation_space
    with pytest.raises(ValueError, match="wrapper ShapedReward would be skipped"):
        make_copies(lambda: gym.make("qlab/Dock-v0", shaping="potential"), 3)
    with pytest.raises(ValueError, match=r"shaping must be one of \['none'\]"):
        make_copies(lambda: gym.make("qlab/LinearQuadratic-v0"), 3, "potential")
