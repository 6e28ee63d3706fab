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

Optional capabilities: the report's diagnostics (:mod:`qlab.compare.diagnostics`) look for these
with ``getattr`` and never ask which class a learner is. A learner without one is reported with
a ``ValueError`` naming the capability, or left out of what needs it.

* ``linear_features``: the state :class:`~qlab.features.FeatureMap` ``phi`` when Q is linear in
  its weights with one weight vector per discrete action, ``Q(s, a) = w_a . phi(s)``; None (or
  absent) otherwise. Then Q lies in the span a least-squares fit projects onto, so the squared
  error splits into approximation and remainder. (TabularQ, LinearQ, LSTDQ with discrete actions.)
* ``fit_function_class(observations, targets, steps)``: the best fit of ``targets``
  ``(N, n_actions)`` at ``observations`` ``(N, obs_dim)`` inside the learner's function class,
  as fitted values ``(N, n_actions)``; it uses the learner's features or architecture and config,
  never its weights or seed. ``steps`` is the optimiser's step count for a class fitted
  iteratively (a network; then the fit is an upper bound of the best one); a closed-form fit
  (least squares for a linear class) needs no steps. ``ValueError`` where the class has no such
  fit. (TabularQ, LinearQ, LSTDQ with discrete actions, QNetLearner.)
* ``quadratic_head``: for continuous actions, a :class:`QuadraticHead` when Q is a quadratic form
  of ``z = [x; u]`` with an affine greedy control; None (or absent) otherwise. A learner with one
  also answers ``q(obs, action)``, Q at given state-action pairs ``(B,)``. (LSTDQ with
  continuous actions.)
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


class QuadraticHead(Protocol):
    """A continuous-action Q of ``z = [x; u]``: ``Q = z'Mz + g'z + c``, greedy control ``u = -K x + k``."""

    gain: np.ndarray  # K, (act_dim, obs_dim)
    offset: np.ndarray  # k, (act_dim,)

    def form(self) -> tuple[np.ndarray, np.ndarray, float]:
        """``(M, g, c)`` of the current weights, ``M`` symmetric ``(n + m, n + m)`` (reward form)."""
        ...

    def q_features(self, obs: np.ndarray, action: np.ndarray) -> np.ndarray:
        """The features of ``(obs, action)`` pairs whose span is the function class, ``(B, n_features)``."""
        ...


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
