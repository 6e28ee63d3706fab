"""Replay memory of raw transitions, sampled uniformly, with n-step returns cut at episode ends.

Layout: transitions arrive in batches of ``B`` (one step of ``B`` parallel copies of a task;
``B = 1`` for a single environment). The first batch fixes ``B``, the number of *streams*. Slot
``row * B + col`` holds the transition of stream ``col`` at time ``row``, rows forming a circle of
``capacity // B`` entries, so the next step of the same stream sits one row further on. Each slot
stores one raw transition (obs, action, reward, next_obs, terminated, truncated) in preallocated
contiguous arrays, nothing more.

n-step returns: from a sampled slot, up to ``n`` rewards of the same stream are summed with
discounts 1, gamma, gamma**2, ..., stopping after a transition that ended its episode (terminated
or truncated) and at the newest stored row. The bootstrap observation is the ``next_obs`` of the
last transition summed; its discount is 0 if that transition terminated, else ``gamma**m`` with
``m`` the number of rewards summed (a truncation bootstraps as usual).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from qlab.learners.protocol import Transitions
from qlab.validation import require_gamma, require_int

_FIELDS = ("obs", "action", "reward", "next_obs", "terminated", "truncated")


@dataclass(frozen=True)
class ReplaySample:
    """A batch of ``K`` n-step training tuples drawn from the replay memory."""

    index: np.ndarray  # (K,) slot of the first transition
    obs: np.ndarray  # (K, obs_dim) observation the action was taken in
    action: np.ndarray  # (K,) or (K, act_dim)
    reward: np.ndarray  # (K,) float64, n-step discounted reward sum
    next_obs: np.ndarray  # (K, obs_dim) bootstrap observation
    discount: np.ndarray  # (K,) float64, gamma**m, or 0 after a termination


class ReplayBuffer:
    """Circular replay memory of ``capacity`` transitions with n-step sampling."""

    def __init__(
        self,
        capacity: int,
        obs_dim: int,
        gamma: float,
        n_step: int = 1,
        obs_dtype: np.dtype | type = np.float32,
        action_shape: tuple[int, ...] = (),
        action_dtype: np.dtype | type = np.int64,
    ):
        self.capacity = require_int("capacity", capacity, 1)
        obs_dim = require_int("obs_dim", obs_dim, 1)
        self.gamma = require_gamma(gamma)
        self.n_step = require_int("n_step", n_step, 1)
        self.obs = np.zeros((self.capacity, obs_dim), dtype=obs_dtype)
        self.action = np.zeros((self.capacity, *action_shape), dtype=action_dtype)
        self.reward = np.zeros(self.capacity, dtype=np.float64)
        self.next_obs = np.zeros((self.capacity, obs_dim), dtype=obs_dtype)
        self.terminated = np.zeros(self.capacity, dtype=bool)
        self.truncated = np.zeros(self.capacity, dtype=bool)
        self.streams = 0  # fixed by the first batch
        self.rows = 0
        self.next_row = 0
        self.filled_rows = 0

    def __len__(self) -> int:
        return self.filled_rows * self.streams

    @property
    def nbytes(self) -> int:
        """Bytes held by the preallocated storage arrays."""
        return sum(getattr(self, name).nbytes for name in _FIELDS)

    def add(self, batch: Transitions) -> None:
        """Store one step of ``B`` streams; every call must carry the same ``B``."""
        b = len(batch)
        if self.streams == 0:
            if b > self.capacity:
                raise ValueError(f"batch of {b} transitions does not fit a replay capacity of {self.capacity}")
            self.streams, self.rows = b, self.capacity // b
        elif b != self.streams:
            raise ValueError(f"every batch must hold {self.streams} transitions (one per stream), got {b}")
        start = self.next_row * b
        rows = slice(start, start + b)
        for name in _FIELDS:
            getattr(self, name)[rows] = np.asarray(getattr(batch, name)).reshape(getattr(self, name)[rows].shape)
        self.next_row = (self.next_row + 1) % self.rows
        self.filled_rows = min(self.filled_rows + 1, self.rows)

    def sample(self, batch_size: int, rng: np.random.Generator) -> ReplaySample:
        """Draw ``batch_size`` stored slots uniformly (with replacement) and form their n-step tuples."""
        if len(self) == 0:
            raise ValueError("cannot sample from an empty replay buffer")
        return self.gather(rng.integers(0, len(self), size=int(batch_size)))

    def gather(self, index: np.ndarray) -> ReplaySample:
        """n-step tuples starting at the given slots (vectorised over slots, a loop over the n steps)."""
        index = np.asarray(index, dtype=np.int64)
        row, col = np.divmod(index, self.streams)
        ahead = (self.next_row - 1 - row) % self.rows  # rows stored after `row` in its stream
        reward = np.zeros(index.shape, dtype=np.float64)
        count = np.zeros(index.shape, dtype=np.int64)
        last = index.copy()
        ended_by_termination = np.zeros(index.shape, dtype=bool)
        live = np.ones(index.shape, dtype=bool)
        scale = 1.0
        for k in range(self.n_step):
            take = live & (k <= ahead)
            slot = ((row + k) % self.rows) * self.streams + col
            reward += np.where(take, scale * self.reward[slot], 0.0)
            count += take
            last = np.where(take, slot, last)
            ended_by_termination = np.where(take, self.terminated[slot], ended_by_termination)
            live = take & ~(self.terminated[slot] | self.truncated[slot])
            scale *= self.gamma
        discount = np.where(ended_by_termination, 0.0, self.gamma ** count.astype(np.float64))
        return ReplaySample(
            index=index,
            obs=self.obs[index],
            action=self.action[index],
            reward=reward,
            next_obs=self.next_obs[last],
            discount=discount,
        )

    def state_dict(self) -> dict[str, Any]:
        """Copies of the stored transitions and the write position (JSON-able scalars + arrays)."""
        n = len(self)
        state: dict[str, Any] = {name: getattr(self, name)[:n].copy() for name in _FIELDS}
        state.update(
            capacity=self.capacity, streams=self.streams, next_row=self.next_row, filled_rows=self.filled_rows
        )
        return state

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore contents saved by :meth:`state_dict` into a buffer of the same capacity."""
        if int(state["capacity"]) != self.capacity:
            raise ValueError(f"replay capacity {self.capacity} does not match the saved {state['capacity']}")
        self.streams = int(state["streams"])
        self.rows = self.capacity // self.streams if self.streams else 0
        self.next_row = int(state["next_row"])
        self.filled_rows = int(state["filled_rows"])
        n = len(self)
        for name in _FIELDS:
            getattr(self, name)[:n] = state[name]
