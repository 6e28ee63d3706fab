"""Shaping audit: what does each shaping variant's optimal policy cost on the task's own reward?

For every shaping variant a Dock task allows, the grid model is solved exactly under that
variant's rewards; its greedy policy is then evaluated on the task's own reward and compared with
the optimum there, at the start distribution and at the worst live grid node. Values are compared,
not actions, since several actions can be optimal. Potential-based shaping should lose nothing
(Ng, Harada & Russell 1999, Theorem 1); the progress bonus may.

The audit also checks the potential for a trap. Shaping with a potential Phi is the same as
starting Q at Phi (Wiewiora 2003, JAIR 19), and terminal states have Phi = 0 (a failure
included), so a live state with Phi < 0 starts out looking worse than crashing: a learner from Q = 0
is drawn to end the episode, even by failing, although the exact optimum is unchanged.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from qlab.reference.dock_answers import grid_reference
from qlab.reference.finite_mdp import evaluate_policy, greedy_policy, value_iteration
from qlab.tasks.dock import Dock
from qlab.validation import require_gamma

#: Phi at every terminal state, the failure terminal included (see qlab.shaping).
TERMINAL_POTENTIAL = 0.0


@dataclass(frozen=True)
class VariantLoss:
    """What the optimal policy of one shaping variant is worth on the task's own reward."""

    variant: str
    start_value: float  # V_base^pi(s0), pi greedy for the variant's Q*
    start_loss: float  # V*_base(s0) - V_base^pi(s0)
    max_loss: float  # max over live grid nodes of V*_base - V_base^pi


@dataclass(frozen=True)
class PotentialTrap:
    """Live states whose potential lies below the potential of the failure terminal (0)."""

    fraction_below: float  # share of the checked live states with Phi < 0
    min_potential: float  # smallest Phi among them
    warning: str | None  # a message when any live state falls below, else None


@dataclass(frozen=True)
class AuditReport:
    """The shaping audit of one Dock task on one grid."""

    gamma: float
    n_position: int
    n_velocity: int
    progress_scale: float
    optimal_start_value: float  # V*_base(s0)
    losses: tuple[VariantLoss, ...]
    trap: PotentialTrap | None  # None when the task allows no potential shaping

    def loss(self, variant: str) -> VariantLoss:
        """The row of ``variant``; ``ValueError`` if the audit has none."""
        for row in self.losses:
            if row.variant == variant:
                return row
        raise ValueError(f"variant must be one of {[row.variant for row in self.losses]}, got {variant!r}")


def potential_trap(task: Any, states: np.ndarray) -> PotentialTrap:
    """Check the task's potential at ``states`` (live states, ``(N, state_dim)``) against Phi = 0 at terminals."""
    phi = np.asarray(task.potential(task.observe(np.asarray(states))), dtype=np.float64)
    below = phi < TERMINAL_POTENTIAL
    fraction = float(below.mean())
    warning = None
    if below.any():
        warning = (
            f"potential trap: Phi < 0 at {fraction:.0%} of the checked live states (lowest {phi.min():.3g}), "
            "below Phi = 0 at the failure terminal. Shaping with Phi equals starting Q at Phi (Wiewiora 2003), "
            "so ending the episode, even by failing, looks better than going on; keep Phi >= 0 at live states."
        )
    return PotentialTrap(fraction_below=fraction, min_potential=float(phi.min()), warning=warning)


def shaping_audit(
    task: Dock,
    gamma: float,
    n_position: int,
    n_velocity: int,
    progress_scale: float | None = None,
    cache: bool | str = False,
) -> AuditReport:
    """Audit every shaping variant of ``task`` on an ``n_position`` x ``n_velocity`` grid model.

    Issues a ``UserWarning`` (and fills ``report.trap.warning``) when the potential has a trap.
    ``gamma`` must lie in (0, 1): at 1 a reward cycle of the progress bonus is worth without bound.
    """
    require_gamma(gamma, above_zero=True, below_one=True, note="for the shaping audit")
    ref = grid_reference(task, gamma, "none", n_position, n_velocity, cache=cache)
    grid, v_star, start = ref.grid, ref.v_star_base, ref.start_weights
    scale = float(task.default_progress_scale if progress_scale is None else progress_scale)
    losses = []
    for variant in task.shaping_variants:
        q_variant = value_iteration(ref.model, grid.rewards(variant, gamma, scale), gamma)
        v_pi = evaluate_policy(ref.model, ref.base_reward, gamma, greedy_policy(q_variant))
        gap = v_star - v_pi
        losses.append(
            VariantLoss(
                variant=variant,
                start_value=float(start @ v_pi),
                start_loss=float(start @ gap),
                max_loss=float(gap[: grid.n_grid].max()),
            )
        )
    trap = potential_trap(task, grid.nodes) if "potential" in task.shaping_variants else None
    if trap is not None and trap.warning is not None:
        warnings.warn(trap.warning, UserWarning, stacklevel=2)
    return AuditReport(
        gamma=float(gamma),
        n_position=grid.n_position,
        n_velocity=grid.n_velocity,
        progress_scale=scale,
        optimal_start_value=float(start @ v_star),
        losses=tuple(losses),
        trap=trap,
    )


def audit_markdown(report: AuditReport) -> str:
    """The audit as a short markdown section: one table row per variant, then the potential check."""
    lines = [
        f"Grid model {report.n_position} x {report.n_velocity}, gamma {report.gamma:g}, "
        f"progress scale {report.progress_scale:g}; V*(s0) on the task's own reward: {report.optimal_start_value:.4g}.",
        "",
        "| shaping | V^pi(s0), own reward | loss at s0 | largest loss on the grid |",
        "|---|---|---|---|",
    ]
    lines += [
        f"| {row.variant} | {row.start_value:.4g} | {row.start_loss:.3g} | {row.max_loss:.3g} |"
        for row in report.losses
    ]
    if report.trap is not None:
        lines.append("")
        lines.append(
            f"**Warning:** {report.trap.warning}"
            if report.trap.warning is not None
            else f"Potential check: Phi >= 0 at every live grid node (lowest {report.trap.min_potential:.3g})."
        )
    return "\n".join(lines) + "\n"
