"""Exact answers on the Dock grid model: Q* of a shaping variant and of the task's own reward.

:func:`grid_reference` solves a :class:`~qlab.reference.dock_grid.DockGrid` by value iteration
once, for one shaping variant and for the task's own reward, so that many learners (and the
shaping audit) can be measured against the same answer. Arrays cover the live grid nodes unless
noted; learners see the nodes as observations, ``task.observe(node)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qlab.reference.dock_grid import DockGrid
from qlab.reference.finite_mdp import TransitionModel, value_iteration
from qlab.tasks.dock import Dock


@dataclass(frozen=True)
class GridReference:
    """Exact answers on a Dock grid for one shaping variant; arrays over live nodes unless noted."""

    grid: DockGrid
    model: TransitionModel
    variant: str
    gamma: float
    observations: np.ndarray  # (n_grid, obs_dim): what a learner sees at each node
    q_star: np.ndarray  # (n_grid, A): Q* of the variant's rewards (what a learner of that variant estimates)
    q_star_base: np.ndarray  # (n_grid, A): Q* of the task's own reward
    base_reward: np.ndarray  # (n_states, A): the task's own reward, absorbing nodes included
    v_star_base: np.ndarray  # (n_states,): V* of the task's own reward, absorbing nodes included
    start_weights: np.ndarray  # (n_states,): the start distribution on the nodes

    @property
    def v_star(self) -> np.ndarray:
        """V* of the variant's rewards at the live nodes, ``(n_grid,)``."""
        return self.q_star.max(axis=1)

    @property
    def optimal_start_value(self) -> float:
        """V*(s0) of the task's own reward under the start distribution."""
        return float(self.start_weights @ self.v_star_base)


def grid_reference(
    task: Dock,
    gamma: float,
    variant: str,
    n_position: int,
    n_velocity: int,
    progress_scale: float | None = None,
    cache: bool | str = False,
) -> GridReference:
    """Solve the Dock grid model for ``variant`` and for the task's own reward (value iteration)."""
    grid = DockGrid(task, n_position, n_velocity, cache=cache)
    model = TransitionModel.build(grid.transitions)
    base_reward = grid.rewards("none", gamma)
    q_base = value_iteration(model, base_reward, gamma)
    rewards = grid.rewards(variant, gamma, progress_scale)  # checks the variant
    q_variant = q_base if variant == "none" else value_iteration(model, rewards, gamma)
    return GridReference(
        grid=grid,
        model=model,
        variant=variant,
        gamma=float(gamma),
        observations=task.observe(grid.nodes),
        q_star=q_variant[: grid.n_grid],
        q_star_base=q_base[: grid.n_grid],
        base_reward=base_reward,
        v_star_base=q_base.max(axis=1),
        start_weights=grid.start_weights(),
    )
