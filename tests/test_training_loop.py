"""The training loop over many task copies: episode boundaries, the single-copy case, recording."""

from __future__ import annotations

import itertools
from collections import Counter

import gymnasium as gym
import numpy as np
import pytest
from runtools import compose_run

import qlab.runspec
from qlab.experiment import episode_seed, run_experiment
from qlab.learners import Transitions, build_learner
from qlab.recording import read_metrics
from qlab.runspec import restore_learner

SMALL = ["task.start_distance_m=[8.0,12.0]", "task.max_steps=60", "evaluation.every_steps=400",
         "evaluation.episodes=3", "checkpoint_every_episodes=5"]


class RecordingLearner:
    """Wraps a learner and keeps every batch of transitions it is given."""

    def __init__(self, inner):
        self.inner, self.batches = inner, []

    def learn(self, batch: Transitions) -> dict[str, float]:
        self.batches.append(batch)
        return self.inner.learn(batch)

    def __getattr__(self, name):
        return getattr(self.inner, name)


@pytest.fixture
def recorded(monkeypatch):
    made = []
    original = qlab.runspec.make_learner

    def make_and_record(*args, **kwargs):
        made.append(RecordingLearner(original(*args, **kwargs)))
        return made[-1]

    monkeypatch.setattr(qlab.runspec, "make_learner", make_and_record)
    return made


def test_no_transition_crosses_an_episode_boundary(tmp_path, recorded):
    cfg = compose_run([*SMALL, "copies=4", "budget_steps=2000", "task.velocity_noise_m_s=0.05",
                       f"results_dir={tmp_path}"])
    run_experiment(cfg, tmp_path / "run", bar=False)
    (learner,) = recorded
    batches = learner.batches
    assert len(batches) == 500 and all(len(b) == 4 for b in batches)
    ends = 0
    for before, after in itertools.pairwise(batches):
        assert not np.any(before.terminated & before.truncated)  # truncated only at the time cap
        ended = before.terminated | before.truncated
        ends += int(ended.sum())
        # a running copy continues where it stopped; an ended one starts afresh (never from its last observation)
        np.testing.assert_array_equal(after.obs[~ended], before.next_obs[~ended])
        assert not np.any(np.all(after.obs[ended] == before.next_obs[ended], axis=1))
    assert ends > 20  # many episodes ended in the middle of the run, in every copy
    assert {i for b in batches for i in np.flatnonzero(b.terminated | b.truncated)} == {0, 1, 2, 3}


def test_one_copy_is_the_plain_single_environment_algorithm(tmp_path):
    # common practice, no source: Q-learning stepped one transition at a time on gymnasium's reset/step
    overrides = [*SMALL, "copies=1", "budget_steps=1200", f"results_dir={tmp_path}"]
    cfg = compose_run(overrides)
    run_experiment(cfg, tmp_path / "run", bar=False)
    learned, _ = restore_learner(tmp_path / "run")

    env = gym.make("qlab/Dock-v0", start_distance_m=(8.0, 12.0), max_steps=60)
    plain = build_learner("tabular", {"gamma": 0.99, "bins": [40]}, env.observation_space, env.action_space, 0)
    episode, steps = 0, 0
    while steps < 1200:
        obs, _ = env.reset(seed=episode_seed(0, episode))
        done = False
        while not done and steps < 1200:
            action = plain.act(np.asarray(obs, dtype=np.float32)[None])[0]
            next_obs, reward, terminated, truncated, _ = env.step(action)
            plain.learn(Transitions.single(obs, action, reward, next_obs, terminated, truncated))
            obs, done, steps = next_obs, terminated or truncated, steps + 1
        episode += 1
    np.testing.assert_array_equal(learned.table, plain.table)


def test_episode_scalars_are_recorded_once_per_step(tmp_path):
    cfg = compose_run([*SMALL, "copies=8", "budget_steps=1600", f"results_dir={tmp_path}"])
    summary = run_experiment(cfg, tmp_path / "run", bar=False)
    rows = read_metrics(tmp_path / "run")
    assert max(Counter((s, t) for s, t, _ in rows).values()) == 1
    counts = [v for _, t, v in rows if t == "episode/count"]
    assert sum(counts) == summary["episodes"] and max(counts) > 1  # copies that end together share one row
    evals = sorted({s for s, t, _ in rows if t.startswith("eval/")})
    assert evals == [0, 400, 800, 1200, 1600]  # evaluations on a fixed grid of the budget
