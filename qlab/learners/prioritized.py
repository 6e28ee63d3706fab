"""Prioritized replay, proportional variant (Schaul, Quan, Antonoglou & Silver 2016, ICLR).

Storage, the per-stream slot layout and the n-step tuples are those of
:class:`~qlab.learners.replay.ReplayBuffer`; this subclass adds a :class:`~qlab.learners.sumtree.SumTree`
over the same slots and changes only which slots are drawn.

* Priority of a slot: ``p_i = (|delta_i| + offset) ** exponent`` from its latest TD error
  ``delta_i`` (the paper's eq. 1 with ``p_i = |delta_i| + epsilon`` and alpha = ``exponent``).
* New transitions enter at the largest priority given so far, 1 before any (Algorithm 1, line 6).
* Sampling: ``P(i) = p_i / sum_k p_k``, independent draws with replacement (like the uniform
  replay's draws), all descending the sum tree together.
* Importance-sampling weights: ``w_i = (N * P(i)) ** -beta / max_j w_j`` with ``N`` the number of
  stored transitions and the maximum taken over the sampled minibatch (sec. 3.4), so the largest
  weight of every minibatch is 1.

A slot whose n-step tuple is not yet complete (its stream has fewer than ``n`` newer rows) is
drawn like any other and its tuple is formed by :meth:`ReplayBuffer.gather`, which stops the sum
at the newest stored row, exactly as in uniform replay.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from qlab.learners.protocol import Transitions
from qlab.learners.replay import ReplayBuffer, ReplaySample
from qlab.learners.sumtree import SumTree
from qlab.validation import require_non_negative, require_positive, require_within


class PrioritizedReplay(ReplayBuffer):
    """:class:`ReplayBuffer` whose slots are drawn in proportion to their priorities."""

    def __init__(
        self,
        capacity: int,
        obs_dim: int,
        gamma: float,
        n_step: int = 1,
        exponent: float = 0.6,
        offset: float = 1e-6,
        obs_dtype: np.dtype | type = np.float32,
        action_shape: tuple[int, ...] = (),
        action_dtype: np.dtype | type = np.int64,
    ):
        super().__init__(capacity, obs_dim, gamma, n_step, obs_dtype, action_shape, action_dtype)
        self.exponent = require_non_negative("exponent", exponent)
        self.offset = require_positive("offset", offset)
        self.tree = SumTree(self.capacity)
        self.max_priority = 1.0

    @property
    def nbytes(self) -> int:
        """Bytes of the stored transitions and of the sum tree."""
        return super().nbytes + self.tree.nbytes

    def add(self, batch: Transitions) -> None:
        """Store one step of ``B`` streams, each new slot at the largest priority given so far."""
        super().add(batch)
        row = (self.next_row - 1) % self.rows
        self.tree.update(row * self.streams + np.arange(self.streams), self.max_priority)

    def sample(self, batch_size: int, rng: np.random.Generator) -> ReplaySample:
        """Draw ``batch_size`` slots with probability ``p_i / sum p`` (with replacement); their n-step tuples."""
        if len(self) == 0:
            raise ValueError("cannot sample from an empty replay buffer")
        return self.gather(self.tree.find(rng.random(int(batch_size)) * self.tree.total))

    def weights(self, index: np.ndarray, beta: float) -> np.ndarray:
        """Importance-sampling weights ``(N P(i)) ** -beta / max_j w_j`` of sampled slots, float64."""
        beta = require_within("beta", beta, 0.0, 1.0)
        probability = self.tree.leaves(index) / self.tree.total
        weight = (len(self) * probability) ** -beta
        return weight / weight.max()

    def set_priorities(self, index: np.ndarray, td_error: np.ndarray) -> None:
        """Priorities ``(|td_error| + offset) ** exponent`` for slots ``index`` (a repeated slot: its last value)."""
        priority = (np.abs(np.asarray(td_error, dtype=np.float64)) + self.offset) ** self.exponent
        self.tree.update(index, priority)
        self.max_priority = max(self.max_priority, float(priority.max()))

    def state_dict(self) -> dict[str, Any]:
        """The uniform replay's state plus the stored slots' priorities and the largest priority given."""
        state = super().state_dict()
        state.update(priority=self.tree.leaves(np.arange(len(self))), max_priority=self.max_priority)
        return state

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore contents and priorities saved by :meth:`state_dict`."""
        missing = [key for key in ("priority", "max_priority") if key not in state]
        if missing:
            raise ValueError(f"replay state has no {missing} entries: it was not saved by a prioritized replay")
        super().load_state_dict(state)
        self.tree.rebuild(state["priority"])
        self.max_priority = float(state["max_priority"])
