"""The one protocol every learner honours, so the experiment loop never special-cases a learner.

A learner is built from the task's spaces, its own config dataclass and a seed, then:

* ``act(obs)``: exploring actions for a batch of observations ``(B, obs_dim)`` (e.g. one per task
  copy), shape ``(B,)`` int64 for discrete actions or ``(B, act_dim)`` for continuous ones; uses the
  learner's own RNG, and exploration schedules count the ``B`` transitions (one observation:
  ``learner.act(obs[None])[0]``);
* ``greedy(obs)``: greedy actions for a batch of observations ``(B, obs_dim)``;
* ``value(obs)``: max_a Q(obs, a) for a batch, shape ``(B,)``;
* ``q_values(obs)``: Q for every discrete action, shape ``(B, n_actions)`` (discrete tasks);
* ``learn(batch)``: take a batch of transitions (one env step of one or of ``B`` task copies);
  returns a dict of learning metrics (may be empty). Online learners update at once; replay and
  batch learners store the data and update on their own schedule (each learner's docstring says
  how a batch relates to one-at-a-time updates). Bootstrapping continues through ``truncated``
  and stops at ``terminated``;
* ``state_dict()`` / ``load_state_dict(d)``: everything needed to resume exactly, including
  RNG states and schedule positions. Leaves are numpy arrays, torch tensors, or JSON-able
  Python scalars, strings, lists and dicts (see :mod:`qlab.checkpoint`); never pickled objects.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np


@dataclass(frozen=True)
class Transitions:
    """A batch of ``B`` transitions; ``action`` is ``(B,)`` int64 or ``(B, act_dim)`` float."""

    obs: np.ndarray
    action: np.ndarray
    reward: np.ndarray
    next_obs: np.ndarray
    terminated: np.ndarray
    truncated: np.ndarray

    def __len__(self) -> int:
        return int(np.asarray(self.reward).shape[0])

    @classmethod
    def single(cls, obs, action, reward, next_obs, terminated, truncated) -> Transitions:
        """Wrap one gymnasium step as a batch of one."""
        return cls(
            obs=np.asarray(obs, dtype=np.float32)[None],
            action=np.asarray(action)[None],
            reward=np.array([reward], dtype=np.float64),
            next_obs=np.asarray(next_obs, dtype=np.float32)[None],
            terminated=np.array([terminated], dtype=bool),
            truncated=np.array([truncated], dtype=bool),
        )


@runtime_checkable
class Learner(Protocol):
    """What the experiment loop, the checkpoints and the diagnostics rely on."""

    def act(self, obs: np.ndarray) -> np.ndarray: ...

    def greedy(self, obs: np.ndarray) -> np.ndarray: ...

    def value(self, obs: np.ndarray) -> np.ndarray: ...

    def q_values(self, obs: np.ndarray) -> np.ndarray: ...

    def learn(self, batch: Transitions) -> dict[str, float]: ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state_dict(self, state: dict[str, Any]) -> None: ...
