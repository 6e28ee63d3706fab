"""The top-level report of a study with several task settings, and the text every report page shares.

Different task settings are different problems: each gets its own full report
(:mod:`qlab.compare.report`), and the overview sets the arms side by side across them: a figure
and a table of the median steps to threshold against the setting, each shaping arm's speed-up
over ``none`` and the IQM final success per setting; then it lists the settings with links to
their reports.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from qlab.compare import figures
from qlab.compare.markup import md_literal
from qlab.compare.measures import ArmMeasures
from qlab.compare.runs import (
    FAILURE_RULE,
    REPORT_MD,
    UNFINISHED,
    Run,
    Study,
    TaskSetting,
    arm_sort_key,
    position,
)
from qlab.compare.stats import ESTIMATE, LOWER_BOUND, UNDETERMINED, MedianRatio, few_seeds_warning

#: the figure of steps to threshold against the task setting
SETTINGS_FIGURE = "steps_by_task_setting.png"
#: how every page treats runs that never reach the success threshold
CENSORING_RULE = ("A run that never reaches the threshold within its budget is censored and counts as never "
                  "(infinitely many steps), so a median over runs of which half or more are censored is not reached "
                  "within the budget: it is printed as a lower bound, `> budget`, with no interval.")
#: how a speed-up (median steps of a base arm over those of an arm) is estimated and printed
SPEED_UP_RULE = ("95% percentile bootstrap intervals, the runs of the two arms resampled independently; a run that "
                 "meets the threshold at step 0 counts as 1 step. Where a median is censored the speed-up is only a "
                 "bound, with no interval: `> x` when the base arm's median lies beyond the budget (x = budget / "
                 "median of the arm), `< x` when the arm's does (x = median of the base arm / budget), `undetermined` "
                 "when both do. An interval end 0.00 or inf: in 2.5% or more of the resamples a median was censored "
                 "(resamples where both were count at both ends).")
CAUTION = ("> Caution: these results come from simulation only. A controller learned here is not fit for real "
           "plant as it is; validate it under local codes and licensed engineering practice.")


def median_steps(m: ArmMeasures) -> str:
    """Median steps to threshold; ``> budget`` when half the runs or more never reached it (no number to give)."""
    return f"> {m.budget:,}" if m.median_censored else f"{m.median_threshold_steps():,.0f}"


def _ratio_end(x: float) -> str:
    return "inf" if np.isinf(x) else f"{x:.2f}"


def speed_up_cell(r: MedianRatio) -> str:
    """A speed-up as a table cell: ``2.11 [1.10, 3.57]``, a bound (``> 4.00``, ``< 0.25``) or ``undetermined``."""
    if r.kind == ESTIMATE:
        return f"{r.value:.2f} [{_ratio_end(r.low)}, {_ratio_end(r.high)}]"
    if r.kind == UNDETERMINED:
        return "undetermined"
    return f"{'>' if r.kind == LOWER_BOUND else '<'} {r.value:.2f}"


def failure_counts(runs: list[Run]) -> tuple[int, int]:
    """How many of ``runs`` diverged and how many crashed, never finished or are damaged."""
    return sum(r.status == "diverged" for r in runs), sum(r.status in UNFINISHED for r in runs)


def seed_warning(measures: dict[str, dict[str, ArmMeasures]]) -> list[str]:
    """The few-seeds warning for the smallest arm, as a note block (empty when there are enough runs)."""
    warning = few_seeds_warning(min(m.n_runs for ms in measures.values() for m in ms.values()))
    return [f"> {warning}", ""] if warning else []


def folder_notes(study: Study) -> list[str]:
    """List items naming folders that are not runs, damaged runs (with what is wrong) and duplicate runs."""
    lines = []
    if study.unreadable:
        lines.append(f"- Folders without a readable config.yaml, not read as runs: "
                     f"{', '.join(map(md_literal, study.unreadable))}.")
    damaged = [r for r in study.runs if r.status == "damaged"]
    if damaged:
        lines.append("- Damaged runs, counted as failures from step 0 (their numbers are not used): "
                     + "; ".join(f"{md_literal(r.name)} ({md_literal(r.damage)})" for r in damaged) + ".")
    if study.duplicates:
        lines.append("- The same run in more than one folder, counted once: "
                     + "; ".join(f"{md_literal(a)} (kept: {md_literal(b)})" for a, b in study.duplicates) + ".")
    return lines


def _far_end(value: Any) -> float | None:
    """A number itself, a list of numbers its largest (the far end of a range); None for anything else."""
    values = value if isinstance(value, tuple) else (value,)
    if values and all(not isinstance(v, tuple) and position(v) is not None for v in values):
        return float(max(values))
    return None


def setting_axis(settings: list[TaskSetting]) -> tuple[list[float], list[str], str]:
    """Where the figure across settings puts each setting: positions, tick labels and the axis label.

    The value of the one varying task key (a range at its far end) when those are distinct numbers;
    otherwise the settings one step apart in their order, labelled by their values.
    """
    keys = sorted({k for s in settings for k in s.values})
    if len(keys) == 1:
        ends = [_far_end(s.values[keys[0]]) for s in settings]
        if None not in ends and len(set(ends)) == len(ends):
            ranged = any(isinstance(s.values[keys[0]], tuple) for s in settings)
            return ends, [f"{x:g}" for x in ends], f"{keys[0]}, far end of the range" if ranged else keys[0]
    return [float(i) for i in range(len(settings))], [s.short_label for s in settings], "task setting (in order)"


def median_steps_cell(m: ArmMeasures) -> str:
    """Median steps with its bootstrap interval, e.g. ``750 [500, 1,000]`` (an end ``inf``: unbounded); or the bound."""
    if m.steps_interval is None:
        return median_steps(m)
    low, high = m.steps_interval
    return f"{median_steps(m)} [{low:,.0f}, {'inf' if np.isinf(high) else f'{high:,.0f}'}]"


def _speed_up_cell(m: ArmMeasures) -> str:
    return speed_up_cell(m.speed_up) if m.speed_up is not None else "no `none` arm"


def _iqm_cell(m: ArmMeasures) -> str:
    e = m.iqm_success
    return f"{e.value:.2f} [{e.low:.2f}, {e.high:.2f}]"


def across_table(
    settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], cell: Callable[[ArmMeasures], str],
    arms: Callable[[str], bool] = lambda arm: True,
) -> list[str]:
    """A table with a row per learner and arm (those ``arms`` keeps) and a column per task setting."""
    pairs = sorted({(lr, a) for m in measures for lr, ms in m.items() for a in ms if arms(a)},
                   key=lambda p: (p[0], arm_sort_key(p[1])))
    lines = ["| learner | arm | " + " | ".join(md_literal(s.short_label) for s in settings) + " |",
             "|---|---|" + "---|" * len(settings)]
    for lr, arm in pairs:
        cells = [cell(m[lr][arm]) if arm in m.get(lr, {}) else "not run" for m in measures]
        lines.append(f"| {md_literal(lr)} | {md_literal(arm)} | " + " | ".join(cells) + " |")
    return lines


def steps_lines(
    settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], threshold: float, out: Path,
) -> list[str]:
    """The section opening the overview: the figure of steps to threshold against the setting, and its table."""
    positions, ticks, xlabel = setting_axis(settings)
    figure = figures.settings_figure(positions, ticks, xlabel, measures, threshold)
    return [f"## Steps to a success rate of {threshold:g} across task settings", "",
            figures.save_figure(figure, out, SETTINGS_FIGURE), "",
            f"Median environment steps to a success rate >= {threshold:g} against the task setting (x: {xlabel}), "
            "one panel per learner, one line per shaping arm in the colours of every figure of these reports (arms "
            "at one setting drawn slightly apart). Filled circles: the median over the reported runs, with a bar for "
            "its 95% percentile bootstrap interval (runs resampled); a bar without a cap at the top runs into the "
            "dashed budget line (through each setting's own budget) and has no upper end (in 2.5% or more of the "
            "resamples the median was censored). Open triangles pointing up, at the budget: half or more of the "
            "runs never reached the threshold, so the median lies beyond the budget (a "
            "lower bound, no interval) and the line breaks there. The step axis is logarithmic when the values drawn "
            f"span more than a factor of {figures.LOG_SPAN:g}. {CENSORING_RULE}", "",
            *across_table(settings, measures, median_steps_cell), ""]


def speed_up_lines(settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]]) -> list[str]:
    """The table of each shaping arm's speed-up over ``none`` (same learner) per task setting."""
    lines = ["## Speed-up over `none` across task settings", "",
             "Median steps to the threshold of `none` divided by those of the arm, same learner and task setting: "
             f"above 1 the arm reaches the threshold sooner. {SPEED_UP_RULE}", ""]
    if not any(m.speed_up is not None for ms in measures for arms in ms.values() for m in arms.values()):
        return [*lines, "No learner has both a `none` arm and a shaped arm in one task setting: nothing to compare.",
                ""]
    return [*lines, *across_table(settings, measures, _speed_up_cell, lambda arm: arm != "none"), ""]


def settings_list_lines(settings: list[TaskSetting]) -> list[str]:
    """The task settings, each linked to its own report, with run and failure counts."""
    lines = ["## Task settings", ""]
    for s in settings:
        n_div, n_crash = failure_counts(s.study.runs)
        learners, arms = (", ".join(map(md_literal, names)) for names in (s.study.learners(), s.study.arms()))
        lines.append(f"- [{md_literal(s.folder)}]({s.folder}/{REPORT_MD}): {md_literal(s.label)}; "
                     f"{len(s.study.runs)} runs ({learners}; arms {arms}), {n_div} diverged, "
                     f"{n_crash} crashed, unfinished or damaged.")
    return [*lines, ""]


def overview_lines(
    study: Study, settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], threshold: float,
    out: Path,
) -> list[str]:
    """The top-level report of a study with several task settings: the arms across the settings, and the settings.

    ``measures[i]`` are the measures of ``settings[i]``; the figure across settings is saved in ``out``.
    """
    shown = ", ".join(md_literal(k, code=True) for k in sorted({k for s in settings for k in s.values}))
    lines = [f"# Comparison report: {md_literal(study.name)}", "", CAUTION, "",
             f"{len(study.runs)} runs read in {len(settings)} task settings: the runs differ in {shown}. Different "
             "task settings are different problems, so each has its own full report (linked under Task settings "
             "below) and nothing is chosen across them (a hyperparameter sweep, if any, is resolved within each "
             f"setting). Columns of the tables below are the task settings. Failure scores: {FAILURE_RULE}.", ""]
    lines += seed_warning({f"{i}/{lr}": ms for i, m in enumerate(measures) for lr, ms in m.items()})
    lines += steps_lines(settings, measures, threshold, out)
    lines += speed_up_lines(settings, measures)
    lines += ["## Final success across task settings", "",
              "Interquartile mean (IQM) of the final success rate over the reported runs, with 95% percentile "
              "bootstrap intervals.", "", *across_table(settings, measures, _iqm_cell), ""]
    lines += settings_list_lines(settings)
    if folder_notes(study):
        lines += [*folder_notes(study), ""]
    return lines
