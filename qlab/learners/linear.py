"""Semi-gradient linear Q-learning: ``Q(s, a) = w_a . phi(s)`` with one weight vector per discrete action.

Update for a transition ``(s, a, r, s')`` (Sutton & Barto 2018, sec. 10.1, with the max of
Q-learning): ``w_a += alpha * delta * phi(s) / n(s)`` with ``delta = r + gamma * max_b Q(s', b) -
Q(s, a)``; the bootstrap term is dropped when the step *terminated* and kept when it was only
*truncated* by a time cap. ``n(s) = |phi(s)|^2`` with ``normalise_step`` (normalised LMS: for
tile coding this is the usual ``alpha / n_tilings``), else 1.

Batches: all TD errors use the weights from before the batch; each weight moves by its step size
times the average of ``delta * phi_i / n`` over the transitions of the batch in which feature
``i`` is active for the action taken (a batch of one is the plain update).

Step sizes: ``step_size_count="step"`` evaluates the schedule at the number of transitions
learned so far; ``"visits"`` at the number of earlier updates of that weight with its feature
active (for one-hot features: the visit count of the state-action pair, so the ``polynomial``
schedule gives ``1/n`` or ``1/n^w`` steps). Exploration is epsilon-greedy with epsilon scheduled
by the number of ``act`` calls; greedy ties are broken at random in ``act`` and by the lowest
index in ``greedy``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from gymnasium import spaces

from qlab.features import FeatureConfig, FeatureMap, build_features
from qlab.learners.protocol import Transitions
from qlab.learners.schedules import ScheduleConfig, check_epsilon

STEP_SIZE_COUNTS = ("step", "visits")


def check_gamma(gamma: float) -> None:
    """Raise ``ValueError`` unless the discount lies in [0, 1]."""
    if not 0.0 <= gamma <= 1.0:
        raise ValueError(f"gamma must lie in [0, 1], got {gamma!r}")


@dataclass
class QLearningConfig:
    """Settings shared by the tabular and linear Q-learners."""

    gamma: float = 0.99
    epsilon: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("constant", 0.1))
    step_size: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("constant", 0.1))
    step_size_count: str = "step"  # "step" | "visits"

    def __post_init__(self) -> None:
        check_gamma(self.gamma)
        check_epsilon("epsilon", self.epsilon)
        self.step_size.build("step_size")
        if not self.step_size.start > 0:
            raise ValueError(f"step_size.start must be > 0, got {self.step_size.start!r}")
        if self.step_size_count not in STEP_SIZE_COUNTS:
            raise ValueError(f"step_size_count must be one of {list(STEP_SIZE_COUNTS)}, got {self.step_size_count!r}")


@dataclass
class LinearConfig(QLearningConfig, FeatureConfig):
    """Semi-gradient linear Q-learning on the feature map named by ``features``."""

    normalise_step: bool = True  # divide the step by |phi(s)|^2 (normalised LMS)

    def __post_init__(self) -> None:
        FeatureConfig.__post_init__(self)
        QLearningConfig.__post_init__(self)


def action_count(space: spaces.Space, learner: str) -> int:
    """Number of actions of a ``Discrete`` space, else ``ValueError``."""
    if not isinstance(space, spaces.Discrete):
        raise ValueError(f"{learner} needs a Discrete action space, got {space!r}")
    return int(space.n)


def epsilon_greedy(q: np.ndarray, epsilon: float, rng: np.random.Generator) -> int:
    """A uniformly random action with probability ``epsilon``, else a greedy one (ties at random)."""
    if rng.random() < epsilon:
        return int(rng.integers(q.size))
    best = np.flatnonzero(q == q.max())
    return int(best[rng.integers(best.size)]) if best.size > 1 else int(best[0])


def rng_state(rng: np.random.Generator) -> dict[str, Any]:
    """The generator's bit-generator state (JSON-able)."""
    return rng.bit_generator.state


def restore_array(name: str, target: np.ndarray, value: Any) -> None:
    """Copy ``value`` into ``target`` in place, checking the shape."""
    arr = np.asarray(value)
    if arr.shape != target.shape:
        raise ValueError(f"state {name!r} must have shape {target.shape}, got {arr.shape}")
    target[...] = arr


class LinearQ:
    """Semi-gradient Q-learning with ``Q(s, a) = sum_i W[i, a] phi_i(s)``."""

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space, config: LinearConfig, seed: int):
        self._setup(build_features(config, observation_space), action_space, config, seed, config.normalise_step)

    def _setup(
        self,
        features: FeatureMap,
        action_space: spaces.Space,
        config: QLearningConfig,
        seed: int,
        normalise: bool,
        initial_weight: float = 0.0,
    ) -> None:
        self.features = features
        self.n_actions = action_count(action_space, type(self).__name__)
        self.gamma = float(config.gamma)
        self.epsilon = check_epsilon("epsilon", config.epsilon)
        self.step_size = config.step_size.build("step_size")
        self.by_visits = config.step_size_count == "visits"
        self.normalise = bool(normalise)
        self.weights = np.full((features.n_features, self.n_actions), float(initial_weight))
        self.visits = np.zeros((features.n_features, self.n_actions), dtype=np.int64)
        self.act_count = 0
        self.learn_count = 0
        self.rng = np.random.default_rng(seed)

    # --- acting -----------------------------------------------------------------------------

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        """Q for every action, ``(B, n_actions)``."""
        idx, val = self.features.rows(obs)
        return np.einsum("bk,bka->ba", val, self.weights[idx])

    def value(self, obs: np.ndarray) -> np.ndarray:
        """max_a Q(obs, a), ``(B,)``."""
        return self.q_values(obs).max(axis=1)

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        """Greedy actions ``(B,)`` int64 (ties: lowest index)."""
        return self.q_values(obs).argmax(axis=1)

    def act(self, obs: np.ndarray) -> int:
        """Epsilon-greedy action for one observation ``(obs_dim,)``."""
        q = self.q_values(np.asarray(obs)[None])[0]
        epsilon = float(self.epsilon(self.act_count))
        self.act_count += 1
        return epsilon_greedy(q, epsilon, self.rng)

    # --- learning ---------------------------------------------------------------------------

    def learn(self, batch: Transitions) -> dict[str, float]:
        """One semi-gradient Q-learning update from a batch of transitions."""
        b = len(batch)
        idx, val = self.features.rows(np.concatenate([batch.obs, batch.next_obs]))  # one call for s and s'
        q = np.einsum("bk,bka->ba", val, self.weights[idx])
        idx, val = idx[:b], val[:b]
        action = np.asarray(batch.action, dtype=np.int64).reshape(-1)
        bootstrap = np.where(np.asarray(batch.terminated, dtype=bool), 0.0, q[b:].max(axis=1))
        delta = np.asarray(batch.reward, dtype=np.float64) + self.gamma * bootstrap - q[np.arange(b), action]
        scale = np.einsum("bk,bk->b", val, val) if self.normalise else np.ones(b)
        contribution = np.divide(delta, scale, out=np.zeros_like(delta), where=scale > 0)[:, None] * val
        keys = idx * self.n_actions + action[:, None]  # (B, k) flat positions in the weight table
        if b == 1:  # the columns of one row are distinct
            where, total, hits = keys[0], contribution[0], (val[0] != 0).astype(np.float64)
        else:
            where, inverse = np.unique(keys.ravel(), return_inverse=True)
            total = np.bincount(inverse, weights=contribution.ravel(), minlength=where.size)
            hits = np.bincount(inverse, weights=(val != 0).ravel(), minlength=where.size)
        flat_weights, flat_visits = self.weights.reshape(-1), self.visits.reshape(-1)
        alpha = np.asarray(self.step_size(flat_visits[where] if self.by_visits else self.learn_count))
        flat_weights[where] += alpha * total / np.maximum(hits, 1.0)
        flat_visits[where] += hits.astype(np.int64)
        self.learn_count += b
        return {
            "abs_td_error": float(np.abs(delta).mean()),
            "step_size": float(alpha.max()),
            "epsilon": float(self.epsilon(self.act_count)),
        }

    # --- checkpoints ------------------------------------------------------------------------

    def state_dict(self) -> dict[str, Any]:
        """Weights, visit counts, counters and the RNG state (copies)."""
        return {
            "weights": self.weights.copy(),
            "visits": self.visits.copy(),
            "act_count": int(self.act_count),
            "learn_count": int(self.learn_count),
            "rng": rng_state(self.rng),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore everything :meth:`state_dict` saved."""
        restore_array("weights", self.weights, state["weights"])
        restore_array("visits", self.visits, state["visits"])
        self.act_count = int(state["act_count"])
        self.learn_count = int(state["learn_count"])
        self.rng.bit_generator.state = state["rng"]
