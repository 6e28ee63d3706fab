"""Shaping audit on a small Dock grid: potential shaping loses nothing, progress is measured, potential traps."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from qlab.compare.audit import audit_markdown, potential_trap, shaping_audit
from qlab.tasks.dock import Dock

GAMMA = 0.99
N_POSITION, N_VELOCITY = 41, 21
TOL = 1e-7  # value iteration stops within 1e-10 of V*; a greedy policy then loses at most ~2e-10 / (1 - gamma)


def short_dock(cls: type[Dock] = Dock) -> Dock:
    """A short channel (6-10 m out) so that a small grid resolves the approach."""
    return cls(start_distance_m=(6.0, 10.0), channel_margin_m=4.0)


class LinearPotentialDock(Dock):
    """Dock with the negative potential Phi = -distance / 120 m of the design notes' trap row."""

    def potential(self, obs: np.ndarray) -> np.ndarray:
        return -self.goal_distance(obs) / 120.0


@pytest.fixture(scope="module")
def report():
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the default potential must not warn
        return shaping_audit(short_dock(), GAMMA, N_POSITION, N_VELOCITY)


def test_every_variant_of_the_task_is_audited(report):
    assert [row.variant for row in report.losses] == list(Dock.shaping_variants)
    assert 0.5 < report.optimal_start_value < 1.0  # success is reachable from the start on this grid
    for row in report.losses:
        assert row.start_value + row.start_loss == pytest.approx(report.optimal_start_value, abs=1e-12)


def test_no_shaping_and_potential_shaping_lose_nothing(report):
    # Sutton & Barto (2018), sec. 3.6: a policy greedy for Q* is optimal.
    assert abs(report.loss("none").start_loss) < TOL
    assert abs(report.loss("none").max_loss) < TOL
    # Ng, Harada & Russell (1999), Theorem 1: the optimal policy under potential-based shaping is
    # optimal for the unshaped task.
    assert abs(report.loss("potential").start_loss) < TOL
    assert abs(report.loss("potential").max_loss) < TOL


def test_progress_loss_is_measured_and_never_negative(report):
    # Bellman optimality (Sutton & Barto 2018, sec. 3.6): no policy beats V*, so the loss is >= 0.
    row = report.loss("progress")
    assert np.isfinite(row.start_loss) and np.isfinite(row.max_loss)
    assert row.start_loss >= -TOL
    assert row.max_loss >= row.start_loss - TOL  # the start distribution averages live nodes


def test_default_potential_has_no_trap(report):
    # Dock's potential exp(-d / 30 m) lies in (0, 1] (its docstring), never below Phi = 0 at terminals.
    assert report.trap is not None
    assert report.trap.warning is None
    assert report.trap.fraction_below == 0.0
    assert report.trap.min_potential > 0.0


def test_negative_potential_trap_is_reported_and_warned():
    task = short_dock(LinearPotentialDock)
    with pytest.warns(UserWarning, match="potential trap"):
        trapped = shaping_audit(task, GAMMA, N_POSITION, N_VELOCITY)
    # Design notes: Phi = -distance / 120 m is negative at every live state outside the berth.
    positions = np.linspace(task.state_low[0], task.state_high[0], N_POSITION)
    outside = np.abs(positions) > task.berth_half_length_m
    assert trapped.trap.fraction_below == pytest.approx(outside.mean(), abs=1e-12)
    assert trapped.trap.min_potential == pytest.approx(-(abs(task.channel_end_m) - task.berth_half_length_m) / 120.0)
    assert "Wiewiora" in trapped.trap.warning
    # Ng, Harada & Russell (1999), Theorem 1 holds for any Phi: the trap slows learning from Q = 0,
    # it does not change the optimal policy.
    assert abs(trapped.loss("potential").start_loss) < TOL


def test_potential_trap_on_given_states():
    task = short_dock(LinearPotentialDock)
    states = np.array([[0.0, 0.0], [-5.0, 0.0], [-13.0, 1.0], [0.5, -0.1]])
    check = potential_trap(task, states)
    assert check.fraction_below == 0.5  # two of the four lie outside the berth (|x| > 1 m)
    assert check.min_potential == pytest.approx(-12.0 / 120.0)
    assert potential_trap(short_dock(), states).warning is None


def test_markdown_has_a_row_per_variant_and_the_trap_line(report):
    text = audit_markdown(report)
    table = [line for line in text.splitlines() if line.startswith("| ")]
    assert len(table) == 1 + len(report.losses)
    for row in report.losses:
        assert any(line.startswith(f"| {row.variant} |") for line in table)
    assert "Warning" not in text and "Phi >= 0" in text
    with pytest.warns(UserWarning):
        trapped = shaping_audit(short_dock(LinearPotentialDock), GAMMA, 23, 11)
    assert "**Warning:** potential trap" in audit_markdown(trapped)


@pytest.mark.parametrize("gamma", [0.0, 1.0, 1.5])
def test_bad_gamma_raises_value_error(gamma):
    with pytest.raises(ValueError, match="gamma"):
        shaping_audit(short_dock(), gamma, 23, 11)
