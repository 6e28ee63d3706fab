"""Report sections that need an exact answer: Q-function diagnostics and the shaping audit.

Dock (discrete thrust, no velocity noise) has an exact grid reference: every reported run's final
learner is restored from its checkpoint and compared with Q* of its own training reward (the
policy loss always on the task's own reward); the approximation error is computed once per
learner and arm, since it depends on the learner's class and config only. Linear-quadratic runs
of a continuous-action LSTD-Q learner are compared with the closed form. Other tasks have no
exact answer and are skipped with a note.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import numpy as np

from qlab.checkpoint import has_checkpoint
from qlab.compare import diagnostics, figures
from qlab.compare.audit import audit_markdown, shaping_audit
from qlab.compare.markup import md_literal
from qlab.compare.measures import iqm_estimate
from qlab.compare.runs import Run, Study
from qlab.compare.selection import Selection
from qlab.compare.stats import iqm
from qlab.learners import Learner
from qlab.reference.dock_answers import GridReference, grid_reference
from qlab.reference.lq import LQReference, lq_reference
from qlab.runspec import CHECKPOINT, make_task, restore_learner

DOCK_ID = "qlab/Dock-v0"
#: full-batch Adam steps of a Q-network's best fit of Q* (half the diagnostics default, to keep reports quick)
NETWORK_FIT_STEPS = 1_000
LQ_ID = "qlab/LinearQuadratic-v0"


def has_grid_reference(run: Run) -> bool:
    """Dock with discrete thrust, no process noise and no dead time: the grid model gives an exact Q*."""
    f = run.flat
    return (run.task_id == DOCK_ID and f.get("task.action_kind", "discrete") == "discrete"
            and float(f.get("task.velocity_noise_m_s", 0.0)) == 0.0 and int(f.get("task.dead_time_steps", 0)) == 0)


def restore(run: Run) -> tuple[Learner, Any]:
    """The run's final learner (from its checkpoint) and its unwrapped task."""
    return restore_learner(run.path, run.config)


def _task_key(run: Run) -> tuple:
    return (*sorted((k, v) for k, v in run.flat.items() if k.startswith("task.")), float(run.flat["gamma"]))


def _scale(run: Run) -> float | None:
    value = run.flat.get("shaping.progress_scale")
    return None if value is None else float(value)


def _usable(runs: list[Run]) -> list[Run]:
    """Finished runs with a checkpoint (a diverged or crashed run has no trustworthy final Q)."""
    return [r for r in runs if not r.failed and has_checkpoint(r.path / CHECKPOINT)]


def _restored(runs: list[Run], label: str, notes: list[str]) -> list[tuple[Run, Learner, Any]]:
    """Usable runs with their restored learner and task; a run that cannot be restored is noted, not fatal."""
    out = []
    for run in _usable(runs):
        try:
            out.append((run, *restore(run)))
        except ValueError as err:
            notes.append(f"{label}: run {md_literal(run.name)} could not be restored ({md_literal(err)}).")
    return out


def _representative(runs: list[Run]) -> Run:
    """The median run by final success (then final discounted return, then seed)."""
    ranked = sorted(runs, key=lambda r: (r.final["success"], r.final["discounted_return"], r.seed))
    return ranked[(len(ranked) - 1) // 2]


def _cell(values: list[float]) -> str:
    finite = np.array([v for v in values if v is not None and np.isfinite(v)])
    if finite.size == 0:
        return "n/a"
    e = iqm_estimate(finite)
    return f"{e.value:.3g} [{e.low:.3g}, {e.high:.3g}]"


def dock_lines(selections: dict[str, Selection], grid: int, out: Path) -> list[str]:
    """Maps, error split and policy loss of the reported Dock runs, against the grid model."""
    refs: dict[tuple, GridReference] = {}

    def reference(run: Run, task: Any) -> GridReference:
        key = (*_task_key(run), run.variant, _scale(run))
        if key not in refs:
            refs[key] = grid_reference(task, float(run.flat["gamma"]), run.variant, grid, grid, _scale(run))
        return refs[key]

    lines = [f"Exact reference: the Dock grid model ({grid} x {grid} nodes), solved by value iteration. Each learner "
             "is compared with Q* of its own training reward; the policy loss V*(s0) - V^pi(s0) is on the task's own "
             "reward. Errors are RMS over grid nodes and actions; IQM over runs with 95% bootstrap intervals. The "
             "approximation error (best fit of Q* in the learner's function class) is computed once per learner and "
             "arm; the remainder is what learning left on top (linear classes only). For a Q-network the best fit is "
             f"{NETWORK_FIT_STEPS} full-batch Adam steps of its architecture on Q*, so its approximation error is an "
             "upper bound.", "",
             "| learner | arm | runs | total RMS error | approximation RMS | remainder RMS | policy loss |",
             "|---|---|---|---|---|---|---|"]
    notes, images = [], []
    for learner_kind, sel in selections.items():
        maps = []
        for arm in sel.arms:
            runs = [r for r in sel.runs[arm] if has_grid_reference(r)]
            shown_kind, shown_arm = md_literal(learner_kind), md_literal(arm)
            failed = sum(r.failed for r in runs)
            unsaved = len(runs) - failed - len(_usable(runs))  # finished, but no checkpoint to restore
            if failed:
                notes.append(f"{shown_kind} / {shown_arm}: {failed} failed run(s) left out of the errors.")
            if unsaved:
                notes.append(f"{shown_kind} / {shown_arm}: {unsaved} finished run(s) without a checkpoint (its "
                             "learner cannot be restored) left out of the errors.")
            restored = _restored(runs, f"{shown_kind} / {shown_arm}", notes)
            if not restored:
                continue
            usable = [run for run, _, _ in restored]
            approx, totals, remainders, losses = None, [], [], []
            shown = _representative(usable)
            for run, learner, task in restored:
                ref = reference(run, task)
                if approx is None:
                    approx = diagnostics.approximation_error(learner, ref, network_steps=NETWORK_FIT_STEPS)
                split = diagnostics.error_split(learner, ref, approximation=approx)
                totals.append(split.total)
                remainders.append(split.remainder)
                losses.append(diagnostics.policy_loss(learner, ref))
                if run is shown:
                    maps.append((arm, run.name, diagnostics.value_maps(learner, ref)))
            lines.append(f"| {shown_kind} | {shown_arm} | {len(usable)} | {_cell(totals)} | {approx:.3g} | "
                         f"{_cell(remainders)} | {_cell(losses)} |")
        if maps:
            fig = figures.value_map_figure(learner_kind, maps)
            images += [figures.save_figure(fig, out, f"values_{learner_kind}.png"), ""]
    maps_note = ("Maps of one representative run per learner and arm (the median run by final success): learned V, "
                 "V* of its training reward and where its greedy action is not optimal for that reward.")
    return [*lines, "", *(f"- {n}" for n in notes), "", maps_note, "", *images]


def _lq_labels(run: Run) -> tuple[str, str]:
    """Axis labels of the state: the default plant (no A, B given) is a double integrator in metres and m/s."""
    if run.flat.get("task.A") is None and run.flat.get("task.B") is None:
        return "state x1: position (m)", "state x2: velocity (m/s)"
    return "state x1", "state x2"


def _finite_iqm(values: list[float]) -> str:
    finite = np.array([v for v in values if np.isfinite(v)])
    return f"{iqm(finite):.3g}" if finite.size else "inf"


def lq_lines(selections: dict[str, Selection], out: Path) -> list[str]:
    """Continuous-action LSTD-Q on the linear-quadratic task against the closed form (maps written to ``out``)."""
    box = diagnostics.LQ_BOX_HALF_WIDTH
    lines = ["Closed-form reference (discounted Riccati solution). Relative Frobenius errors of the gain and of the "
             "Q matrix, and the cost of the learned gain over the optimal cost (1 is optimal). Q errors are RMS of "
             f"Q - Q* over a uniform grid of states in [-{box:g}, {box:g}] per state dimension x "
             f"{diagnostics.LQ_ACTION_POINTS} controls per action dimension in u*(x) +- "
             f"{diagnostics.LQ_ACTION_HALF_WIDTH:g}. Quadratic features span Q* exactly, so the approximation error "
             "is 0 (computed by least squares, it shows round-off only) and the remainder is the whole error. The "
             "policy loss is V*(x0) - V^K(x0) of the learned gain K (Lyapunov equation; its offset and the control "
             "clipping not scored), averaged over the start distribution; infinite for an unstable gain. IQM over "
             "runs (finite values only).", "",
             "| learner | arm | runs | gain error | Q-matrix error | cost ratio | unstable gains | total RMS error | "
             "approximation RMS | remainder RMS | policy loss |",
             "|---|---|---|---|---|---|---|---|---|---|---|"]
    refs: dict[str, LQReference] = {}
    skipped, images = [], []
    for learner_kind, sel in selections.items():
        maps = []
        for arm in sel.arms:
            rows, splits, losses = [], [], []
            runs = [r for r in sel.runs[arm] if r.task_id == LQ_ID]
            shown_kind, shown_arm = md_literal(learner_kind), md_literal(arm)
            restored = _restored(runs, f"{shown_kind} / {shown_arm}", skipped)
            shown = _representative([run for run, _, _ in restored]) if restored else None
            for run, learner, task in restored:
                gamma = float(run.flat["gamma"])
                try:
                    rows.append(diagnostics.lq_diagnostics(learner, task.A, task.B, task.Q, task.R, gamma))
                    key = repr(_task_key(run))
                    if key not in refs:
                        refs[key] = lq_reference(task, gamma)
                    ref = refs[key]
                    splits.append(diagnostics.lq_error_split(learner, ref))
                    losses.append(diagnostics.lq_policy_loss(learner, ref))
                except ValueError as err:
                    skipped.append(f"{shown_kind} / {shown_arm}: {md_literal(err)}")
                    break
                if run is shown and task.A.shape[0] == 2:
                    maps.append((arm, run.name, diagnostics.lq_value_maps(learner, ref, labels=_lq_labels(run))))
                elif run is shown:
                    skipped.append(f"maps of {shown_kind} / {shown_arm}: the state is {task.A.shape[0]}-D "
                                   "(maps need 2-D)")
            if rows and len(splits) == len(rows):
                ratios = [d.cost_ratio for d in rows]
                lines.append(
                    f"| {shown_kind} | {shown_arm} | {len(rows)} | {iqm([d.gain_error for d in rows]):.3g} | "
                    f"{iqm([d.q_matrix_error for d in rows]):.3g} | {_finite_iqm(ratios)} | "
                    f"{int((~np.isfinite(ratios)).sum())} | {iqm([e.total for e in splits]):.3g} | "
                    f"{iqm([e.approximation for e in splits]):.2g} | {iqm([e.remainder for e in splits]):.3g} | "
                    f"{_finite_iqm(losses)} |")
        if maps:
            fig = figures.lq_value_map_figure(learner_kind, maps)
            images += [figures.save_figure(fig, out, f"lq_values_{learner_kind}.png"), ""]
    maps_note = ("Maps of one representative run per learner and arm (the median run by final discounted return) "
                 f"over states in [-{box:g}, {box:g}]^2: learned V (Q at the learner's greedy control), V* and the "
                 "distance of the learner's greedy control from u* (both unclipped).")
    return [*lines, "", *(f"- skipped {s}" for s in sorted(set(skipped))), "",
            *([maps_note, "", *images] if images else [])]


def audit_lines(study: Study, grid: int) -> list[str]:
    """The shaping audit of every Dock task setting in the study (with a grid reference)."""
    lines = ["## Shaping audit", ""]
    settings: dict[tuple, list[Run]] = {}
    for run in study.runs:
        if has_grid_reference(run):
            settings.setdefault(_task_key(run), []).append(run)
    if not settings:
        return [*lines, "No Dock runs with an exact grid model in this study: no audit.", ""]
    for runs in settings.values():
        scales = {_scale(r) for r in runs if r.variant == "progress"}
        scale = scales.pop() if len(scales) == 1 else None
        task = build_task(runs[0])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # the trap warning is in the markdown
            report = shaping_audit(task, float(runs[0].flat["gamma"]), grid, grid, scale)
        if len(settings) > 1:
            lines.append(f"Task setting of run {md_literal(runs[0].name)}:")
            lines.append("")
        lines += ["What the optimal policy of each shaping variant is worth on the task's own reward (exact, on the "
                  "grid model with the runs' task parameters).", "", audit_markdown(report).rstrip(), ""]
    return lines


def build_task(run: Run) -> Any:
    """The run's task (unwrapped), built from its config."""
    return make_task(run.config.task).unwrapped


def diagnostics_lines(study: Study, selections: dict[str, Selection], grid: int, out: Path) -> list[str]:
    """The Q-function diagnostics section and the shaping audit, as markdown lines (figures written to ``out``)."""
    lines = ["## Q-function diagnostics", ""]
    runs = [r for sel in selections.values() for rs in sel.runs.values() for r in rs]
    if any(has_grid_reference(r) for r in runs):
        lines += ["### Dock: learned Q against the exact grid reference", "", *dock_lines(selections, grid, out)]
    if any(r.task_id == LQ_ID for r in runs):
        lines += ["### Linear-quadratic: learned Q against the closed form", "", *lq_lines(selections, out)]
    others = sorted({md_literal(r.task_id) for r in runs if not has_grid_reference(r) and r.task_id != LQ_ID})
    if others:
        lines += [f"No exact answer for {', '.join(others)} (or Dock with noise, continuous thrust or dead time): "
                  "diagnostics skipped for those runs.", ""]
    return lines + audit_lines(study, grid)
