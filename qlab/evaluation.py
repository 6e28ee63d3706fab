"""Greedy evaluation episodes run as one batch of task copies, one copy per start seed."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from qlab.copies import Copies
from qlab.learners.protocol import Learner


def evaluate(learner: Learner, copies: Copies, start_seeds: Sequence[int], gamma: float) -> dict[str, float]:
    """Greedy episodes from seeded starts (copy ``i`` reset with ``start_seeds[i]``), scored on the task's own reward.

    Every step asks the learner for the greedy actions of all still-running copies in one
    ``greedy`` call. Returns the means over episodes of: ``success`` (success flag of the
    last step), ``discounted_return`` and ``return`` (on ``base_reward``), ``length``, ``q_start``
    (``learner.value`` of the start observations) and ``trained_discounted_return`` (on the
    training reward, shaping included: the number ``q_start`` estimates).
    """
    n = len(start_seeds)
    if copies.n != n:
        raise ValueError(f"evaluation needs one copy per start seed ({n}), got {copies.n} copies")
    obs = np.asarray(copies.reset(None, np.asarray(start_seeds, dtype=np.int64)), dtype=np.float32)
    q_start = learner.value(obs)
    running = np.ones(n, dtype=bool)
    discounted, trained, total = np.zeros(n), np.zeros(n), np.zeros(n)
    length = np.zeros(n, dtype=np.int64)
    success = np.zeros(n, dtype=bool)
    t = 0
    while running.any():
        every = running.all()  # a slice, not a list of rows, while every copy runs (same numbers, less indexing)
        rows = slice(None) if every else np.flatnonzero(running)
        step = copies.step(learner.greedy(obs[rows]), None if every else running)
        discount = gamma**t  # every running copy is at step t
        discounted[rows] += discount * step.base_reward
        trained[rows] += discount * step.reward
        total[rows] += step.base_reward
        length[rows] += 1
        success[rows] = step.success
        obs[rows] = step.next_obs
        running[rows] = ~(step.terminated | step.truncated)
        t += 1
    return {
        "success": float(np.mean(success)),
        "discounted_return": float(np.mean(discounted)),
        "return": float(np.mean(total)),
        "length": float(np.mean(length)),
        "q_start": float(np.mean(np.asarray(q_start, dtype=np.float64))),
        "trained_discounted_return": float(np.mean(trained)),
    }
