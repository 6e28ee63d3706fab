"""Sum tree: non-negative leaf priorities with O(log n) update and proportional sampling.

The tree lives in one preallocated float64 array ``nodes`` of ``2 * size`` entries, ``size`` the
smallest power of two >= ``capacity``: the root is ``nodes[1]``, node ``i`` has children ``2i``
and ``2i + 1``, and leaf ``k`` is ``nodes[size + k]`` (leaves past ``capacity`` stay 0). Every
internal node is the sum of its two children, recomputed from them on each update (never
adjusted by differences), so a tree rebuilt from its leaves is identical bit for bit. Updates
and searches handle a whole batch of leaves together, one vector operation per tree level.
"""

from __future__ import annotations

import numpy as np


class SumTree:
    """Binary tree of partial sums over ``capacity`` leaf priorities."""

    def __init__(self, capacity: int):
        self.capacity = int(capacity)
        self.depth = max(self.capacity - 1, 0).bit_length()
        self.size = 1 << self.depth
        self.nodes = np.zeros(2 * self.size, dtype=np.float64)

    @staticmethod
    def bytes_for(capacity: int) -> int:
        """Bytes of the ``nodes`` array of a tree over ``capacity`` leaves."""
        return 2 * (1 << max(int(capacity) - 1, 0).bit_length()) * 8

    @property
    def nbytes(self) -> int:
        """Bytes held by the preallocated ``nodes`` array."""
        return self.nodes.nbytes

    @property
    def total(self) -> float:
        """Sum of all leaf priorities."""
        return float(self.nodes[1])

    def leaves(self, index: np.ndarray) -> np.ndarray:
        """Priorities of the given leaves."""
        return self.nodes[self.size + np.asarray(index, dtype=np.int64)]

    def update(self, index: np.ndarray, priority: np.ndarray | float) -> None:
        """Set leaves ``index`` to ``priority`` (broadcast); where an index repeats, its last value wins."""
        index = np.asarray(index, dtype=np.int64).reshape(-1)
        priority = np.broadcast_to(np.asarray(priority, dtype=np.float64), index.shape)
        if index.size == 0:
            return
        if index.min() < 0 or index.max() >= self.capacity:
            raise ValueError(f"leaf indices must lie in [0, {self.capacity}), got {index.min()}..{index.max()}")
        bad = ~(np.isfinite(priority) & (priority >= 0))
        if bad.any():
            raise ValueError(f"priorities must be finite numbers >= 0, got {priority[bad][:3]}")
        unique, last = np.unique(index[::-1], return_index=True)  # first in reverse order = last given
        node = unique + self.size
        self.nodes[node] = priority[::-1][last]
        for _ in range(self.depth):
            node = node >> 1  # a parent named twice gets the same sum twice: no need to deduplicate
            self.nodes[node] = self.nodes[2 * node] + self.nodes[2 * node + 1]

    def rebuild(self, priority: np.ndarray) -> None:
        """Replace all leaves: the first ``len(priority)`` get ``priority``, the rest 0; sums recomputed."""
        priority = np.asarray(priority, dtype=np.float64).reshape(-1)
        if priority.size > self.capacity or not np.all(np.isfinite(priority) & (priority >= 0)):
            raise ValueError(f"need at most {self.capacity} finite priorities >= 0, got {priority.size}")
        self.nodes[:] = 0.0
        self.nodes[self.size : self.size + priority.size] = priority
        for level in range(self.depth - 1, -1, -1):
            node = np.arange(1 << level, 2 << level)
            self.nodes[node] = self.nodes[2 * node] + self.nodes[2 * node + 1]

    def find(self, mass: np.ndarray) -> np.ndarray:
        """Leaf of each ``mass`` in ``[0, total)``: the ``k`` with ``sum(p[:k]) <= mass < sum(p[:k + 1])``.

        All masses descend together level by level. A subtree of zero sum is never entered, so
        rounding near ``total`` still ends on a leaf of positive priority.
        """
        if not self.nodes[1] > 0:
            raise ValueError("cannot search a sum tree whose priorities are all zero")
        mass = np.asarray(mass, dtype=np.float64).copy()
        node = np.ones(mass.shape, dtype=np.int64)
        for _ in range(self.depth):
            left = self.nodes[2 * node]
            right_side = (mass >= left) & (self.nodes[2 * node + 1] > 0)
            mass = np.where(right_side, mass - left, mass)
            node = 2 * node + right_side
        return node - self.size
