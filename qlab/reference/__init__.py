"""Exact reference answers: finite-MDP value iteration, LQ Riccati solutions, grid models of the tasks solved.

The finite-MDP tools load eagerly. The LQ and grid-model names load on first use, so a missing
or broken optional module fails only where its names are used.
"""

from __future__ import annotations

import importlib
from typing import Any

from qlab.reference.finite_mdp import (
    TransitionModel,
    bellman_backup,
    evaluate_policy,
    greedy_policy,
    q_from_v,
    value_iteration,
)

_LAZY_NAMES = {
    "lq_solution": "qlab.reference.lq",
    "gain_q_matrix": "qlab.reference.lq",
    "noise_offset": "qlab.reference.lq",
    "cost_to_go_matrix": "qlab.reference.lq",
    "LQReference": "qlab.reference.lq",
    "lq_reference": "qlab.reference.lq",
    "lq_states": "qlab.reference.lq",
    "DockGrid": "qlab.reference.dock_grid",
    "GridReference": "qlab.reference.dock_answers",
    "grid_reference": "qlab.reference.dock_answers",
}


def __getattr__(name: str) -> Any:
    """Import a lazily exported name from its module on first access."""
    module_name = _LAZY_NAMES.get(name)
    if module_name is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(module_name), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY_NAMES))


__all__ = [
    "DockGrid",
    "GridReference",
    "LQReference",
    "TransitionModel",
    "bellman_backup",
    "cost_to_go_matrix",
    "evaluate_policy",
    "gain_q_matrix",
    "greedy_policy",
    "grid_reference",
    "lq_reference",
    "lq_solution",
    "lq_states",
    "noise_offset",
    "q_from_v",
    "value_iteration",
]
