"""Tabular Q-learning on a uniform grid of the observation space (Watkins 1989).

``Q[cell(s), a] += alpha * (r + gamma * max_b Q[cell(s'), b] - Q[cell(s), a])``, the bootstrap
term dropped when the step *terminated* (kept when it was only *truncated* by a time cap). A
table is a linear function of one-hot cell features (Sutton & Barto 2018, sec. 9.3), so this is
:class:`~qlab.learners.linear.LinearQ` on :class:`~qlab.features.GridBins`, with the same batch,
step-size (``step_size_count="visits"``: the visit count of the cell-action pair) and
exploration rules.

:meth:`TabularQ.initialise_from` starts the table at a function of the state (e.g. the task's
potential Phi), read at each cell's centre: for a true table, starting Q at Phi and learning on
the base reward is the same as starting at 0 and learning on the Phi-shaped reward, Q differing by
Phi(s) at every step (Wiewiora 2003, JAIR 19).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from gymnasium import spaces

from qlab.features import BINS_NOTE, FeatureConfig, GridBins, feature_count, resolve_bounds
from qlab.learners.linear import LinearQ, QLearningConfig, action_total, function_values
from qlab.learners.protocol import Transitions
from qlab.validation import require_int_list


@dataclass
class TabularConfig(QLearningConfig):
    """Q-learning on a grid of ``bins`` cells per observation dimension."""

    bins: list[int] = field(default_factory=lambda: [20])  # cells per dimension (one value for all)
    low: list[float] = field(default_factory=list)  # grid lower bounds; empty: the observation space's
    high: list[float] = field(default_factory=list)  # grid upper bounds; empty: the observation space's
    initial_q: float = 0.0  # starting value of every table entry

    def __post_init__(self) -> None:
        super().__post_init__()
        require_int_list("bins", self.bins, 1, BINS_NOTE)
        if not np.isfinite(self.initial_q):
            raise ValueError(f"initial_q must be finite, got {self.initial_q!r}")


class TabularQ(LinearQ):
    """One Q-value per grid cell and discrete action."""

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space, config: TabularConfig, seed: int):
        low, high = resolve_bounds(observation_space, config.low, config.high)
        grid = GridBins(low, high, config.bins)
        self._setup(grid, action_space, config, seed, normalise=False, initial_weight=config.initial_q)

    @classmethod
    def memory_bytes(cls, config: TabularConfig, observation_space: spaces.Space,
                     action_space: spaces.Space) -> tuple[int, str]:
        """Bytes of the table and its visit counts (8 + 8 per cell and action), and the settings that decide it."""
        cells, _ = feature_count(FeatureConfig(features="grid", bins=list(config.bins)), observation_space)
        return 16 * cells * action_total(action_space), "bins"

    @property
    def table(self) -> np.ndarray:
        """The Q-table ``(n_cells, n_actions)`` (a view; cells in C order of the grid)."""
        return self.weights

    def cell_centres(self) -> np.ndarray:
        """Centre of every cell, ``(n_cells, d)``, in the table's (C) order."""
        grid = self.features
        coords = np.stack(np.unravel_index(np.arange(grid.n_features), tuple(grid.bins)), axis=1)
        return grid.low + (coords + 0.5) * grid.width

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        """Q for every action, ``(B, n_actions)``: the table rows of the observations' cells."""
        return self.weights[self.features.index(obs)]

    def learn(self, batch: Transitions) -> dict[str, float]:
        """:meth:`LinearQ.learn` on one-hot cells, computed on the cell indices directly (same numbers)."""
        b = len(batch)
        cells = self.features.index(np.concatenate([batch.obs, batch.next_obs]))  # one call for s and s'
        q = self.weights[cells]
        action = np.asarray(batch.action, dtype=np.int64).reshape(-1)
        keys = cells[:b] * self.n_actions + action
        bootstrap = np.where(np.asarray(batch.terminated, dtype=bool), 0.0, q[b:].max(axis=1))
        delta = np.asarray(batch.reward, dtype=np.float64) + self.gamma * bootstrap - self.weights.reshape(-1)[keys]
        alpha = self._apply(keys, delta, np.ones(b))
        return self._metrics(delta, q[:b], alpha)

    def initialise_from(self, values: Callable[[np.ndarray], np.ndarray]) -> None:
        """Set ``Q(cell, a) = values(centre of cell)`` for every action (``values``: ``(B, d)`` -> ``(B,)``).

        Exact for the table: every state in a cell shares the cell's value. Visit counts and
        counters are left as they are.
        """
        self.weights[:] = function_values(values, self.cell_centres())[:, None]
