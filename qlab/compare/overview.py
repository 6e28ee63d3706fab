"""The top-level report of a study with several task settings, and the text every report page shares.

Different task settings are different problems: each gets its own full report
(:mod:`qlab.compare.report`), and the overview lists the settings with links to those reports
and sets the arms side by side across them (IQM final success, median steps to threshold, and a
figure of the steps against the setting when one numeric task key varies).
"""

from __future__ import annotations

from pathlib import Path

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


def figure_key(settings: list[TaskSetting]) -> str | None:
    """The one varying task key when its values lie on a number line at distinct points; else None."""
    keys = {k for s in settings for k in s.values}
    if len(keys) != 1:
        return None
    key = keys.pop()
    xs = [position(s.values[key]) for s in settings]
    return key if None not in xs and len(set(xs)) == len(xs) else None


def overview_lines(
    study: Study, settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], threshold: float,
    out: Path,
) -> list[str]:
    """The top-level report of a study with several task settings: the settings, linked, and one table across them.

    ``measures[i]`` are the measures of ``settings[i]``; the figure across settings is saved in ``out``.
    """
    keys = sorted({k for s in settings for k in s.values})
    shown = ", ".join(md_literal(k, code=True) for k in keys)
    lines = [f"# Comparison report: {md_literal(study.name)}", "", CAUTION, "",
             f"{len(study.runs)} runs read in {len(settings)} task settings: the runs differ in {shown}. Different "
             "task settings are different problems, so each has its own full report and nothing is chosen across "
             "them (a hyperparameter sweep, if any, is resolved within each setting).", "", "## Task settings", ""]
    for s in settings:
        n_div, n_crash = failure_counts(s.study.runs)
        learners, arms = (", ".join(map(md_literal, names)) for names in (s.study.learners(), s.study.arms()))
        lines.append(f"- [{md_literal(s.folder)}]({s.folder}/{REPORT_MD}): {md_literal(s.label)}; "
                     f"{len(s.study.runs)} runs ({learners}; arms {arms}), {n_div} diverged, "
                     f"{n_crash} crashed, unfinished or damaged.")
    lines += ["", "## Across task settings", "",
              f"Per learner and arm, in each task setting (columns by {shown}): the interquartile mean (IQM) of the "
              f"final success rate over the reported runs, and the median environment steps to a success rate >= "
              f"{threshold:g}. {CENSORING_RULE} Failure scores: {FAILURE_RULE}. Intervals and the rest are in each "
              "setting's report.", ""]
    lines += seed_warning({f"{i}/{lr}": ms for i, m in enumerate(measures) for lr, ms in m.items()})
    labels = [md_literal(s.short_label) for s in settings]
    header = "| learner | arm | " + " | ".join(f"{x}: IQM final success | {x}: median steps" for x in labels) + " |"
    lines += [header, "|---|---|" + "---|---|" * len(settings)]
    pairs = sorted({(lr, a) for m in measures for lr, ms in m.items() for a in ms},
                   key=lambda p: (p[0], arm_sort_key(p[1])))
    for lr, arm in pairs:
        cells = []
        for m in measures:
            am = m.get(lr, {}).get(arm)
            cells += [f"{am.iqm_success.value:.2f}", median_steps(am)] if am else ["not run", "not run"]
        lines.append(f"| {md_literal(lr)} | {md_literal(arm)} | " + " | ".join(cells) + " |")
    lines.append("")
    key = figure_key(settings)
    if key is not None:
        lines.append(figures.save_figure(figures.settings_figure(settings, measures, key, threshold), out,
                                         SETTINGS_FIGURE))
    else:
        lines.append("No figure across settings: it needs exactly one varying task key whose values are numbers or "
                     "lists of numbers (drawn at their midpoints) at distinct points.")
    lines.append("")
    if folder_notes(study):
        lines += [*folder_notes(study), ""]
    return lines
