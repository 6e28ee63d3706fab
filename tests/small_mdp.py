"""A small seeded random MDP shared by the tabular and linear learner tests."""

from __future__ import annotations

import numpy as np
from gymnasium import spaces

N_STATES, N_ACTIONS, GAMMA = 5, 2, 0.5


def random_mdp(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A seeded random MDP: P[a, s, s'] from a flat Dirichlet, R[s, a] uniform in [0, 1]."""
    rng = np.random.default_rng(seed)
    return rng.dirichlet(np.ones(N_STATES), size=(N_ACTIONS, N_STATES)), rng.uniform(0.0, 1.0, (N_STATES, N_ACTIONS))


def state_space() -> spaces.Box:
    """1-D observation = state index; with ``bins = N_STATES`` every state gets its own cell."""
    return spaces.Box(-0.5, N_STATES - 0.5, shape=(1,), dtype=np.float32)


def one_row_rule(q: np.ndarray, epsilon: float, rng: np.random.Generator) -> int:
    """Epsilon-greedy for one observation (Sutton & Barto 2018, sec. 2.3), ties broken uniformly at random,
    written out for one row in the learners' draw order: ``n_actions + 1`` uniforms, the first to decide
    whether to explore, the index of the largest of the rest (among the tied maxima when greedy) as the action."""
    draws = rng.random(q.size + 1)
    if draws[0] < epsilon:
        return int(np.argmax(draws[1:]))
    best = np.flatnonzero(q == q.max())
    return int(best[np.argmax(draws[1:][best])])
