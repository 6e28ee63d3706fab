"""The comparison report of a study: ``report.md``, a self-contained ``report.html`` and PNG figures.

``qlab-report results/<study>`` reads every run of the study (:mod:`qlab.compare.runs`), picks
the reported runs (:mod:`qlab.compare.selection`), computes the statistics
(:mod:`qlab.compare.measures`), draws the figures (:mod:`qlab.compare.figures`), adds exact
Q-function diagnostics and the shaping audit where an exact answer exists
(:mod:`qlab.compare.exact`) and writes the report beside the figures.

Task settings are never compared as if they were hyperparameters: when the runs differ in a
``task.*`` key, each task setting gets its own full report in a subfolder named after it, and the
top-level report lists the settings with links and sets the arms side by side across them (IQM
final success, median steps to threshold, and a figure of the steps against the setting when
one numeric task key varies).
"""

from __future__ import annotations

import argparse
import re
import sys
from pathlib import Path

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from qlab.compare import exact, figures
from qlab.compare.markup import markdown_to_html
from qlab.compare.measures import ArmMeasures, Estimate, learner_measures
from qlab.compare.runs import (
    FAILURE_RULE,
    REPORT_MD,
    Study,
    TaskSetting,
    arm_sort_key,
    load_study,
    position,
    split_by_task,
)
from qlab.compare.selection import Selection, parse_seeds, select
from qlab.compare.stats import few_seeds_warning
from qlab.recording import atomic_write_text

REPORT_HTML = "report.html"
#: the figure of steps to threshold against the task setting (top-level report of a study with several settings)
SETTINGS_FIGURE = "steps_by_task_setting.png"
# a Markdown link to a report page: markup.py has no links, so the HTML page gets them here
_REPORT_LINK = re.compile(r"\[([^\]\[<>]+)\]\(([^()\s\"<>]*)report\.(?:md|html)\)")
CAUTION = ("> Caution: these results come from simulation only. A controller learned here is not fit for real "
           "plant as it is; validate it under local codes and licensed engineering practice.")


def _interval(e: Estimate, digits: int = 2) -> str:
    return f"{e.value:.{digits}f} [{e.low:.{digits}f}, {e.high:.{digits}f}]"


def _steps(value: float) -> str:
    return f"{value:,.0f}"


def _median_steps(m: ArmMeasures) -> str:
    """Median steps to threshold; a lower bound (``>=``) when half the runs or more never reached it."""
    text = _steps(m.median_threshold_steps())
    return f">= {text}" if 2 * m.n_censored >= m.n_runs else text


def _verdict(e: Estimate) -> str:
    if e.covers_half:
        return "not distinguishable (interval covers 0.5)"
    return "better than `none` (interval above 0.5)" if e.low > 0.5 else "worse than `none` (interval below 0.5)"


def _speed_ratio(fast: ArmMeasures, base: ArmMeasures) -> str:
    """How many times fewer steps ``fast`` needs than ``base`` to reach the threshold (median runs)."""
    fast_bound, base_bound = 2 * fast.n_censored >= fast.n_runs, 2 * base.n_censored >= base.n_runs
    if fast_bound:
        return "reaches the threshold in at most half of its runs within the budget"
    ratio = base.median_threshold_steps() / max(fast.median_threshold_steps(), 1.0)
    if ratio == 1.0 and not base_bound:
        return "the same median steps as `none`"
    if ratio >= 1.0:
        return f"{'at least ' if base_bound else ''}{ratio:.1f} times fewer steps than `none` (median runs)"
    if base_bound:
        return "speed against `none` undetermined (half or more `none` runs never reached the threshold)"
    return f"{1.0 / ratio:.1f} times more steps than `none` (median runs)"


def _fastest(ms: dict[str, ArmMeasures]) -> tuple[ArmMeasures, list[str]]:
    """The arm with the fewest median steps to threshold (ties: higher IQM final scores) and arms tied with it."""
    fast = min(ms.values(), key=lambda m: (m.median_threshold_steps(), -m.iqm_success.value, -m.iqm_return.value))
    tied = [a for a, m in ms.items() if a != fast.arm and m.median_threshold_steps() == fast.median_threshold_steps()]
    return fast, tied


def summary_lines(study: Study, measures: dict[str, dict[str, ArmMeasures]], threshold: float) -> list[str]:
    """The plain-language summary: per learner the fastest arm, by how much, and how sure."""
    lines = ["## Summary", ""]
    n_div = sum(r.status == "diverged" for r in study.runs)
    n_crash = sum(r.status == "crashed" for r in study.runs)
    lines.append(f"- {len(study.runs)} runs read: {n_div} diverged, {n_crash} crashed or unfinished "
                 f"(failure scores: {FAILURE_RULE}).")
    for learner, ms in measures.items():
        fast, tied = _fastest(ms)
        ties = f" (tied on median steps with {', '.join(f'`{a}`' for a in tied)})" if tied else ""
        head = (f"- **{learner}**: `{fast.arm}` learns fastest{ties}: median {_median_steps(fast)} environment steps "
                f"to a success rate >= {threshold:g} ({fast.n_censored} of {fast.n_runs} runs never reached it).")
        if 2 * fast.n_censored >= fast.n_runs:
            head = (f"- **{learner}**: no arm reaches a success rate >= {threshold:g} in more than half of its runs "
                    "within the budget.")
        lines.append(head)
        base = ms.get("none")
        for arm, m in ms.items():
            if base is None or arm == "none" or m.improvement_success is None:
                continue
            lines.append(
                f"    - `{arm}` against `none`: {_speed_ratio(m, base)}; IQM final success {m.iqm_success.value:.2f} "
                f"vs {base.iqm_success.value:.2f} ({m.iqm_success.value - base.iqm_success.value:+.2f}); "
                f"P(`{arm}` beats `none` on final success) = {_interval(m.improvement_success)}: "
                f"{_verdict(m.improvement_success)}.")
        failed = [(a, m.n_diverged, m.n_crashed) for a, m in ms.items() if m.n_diverged or m.n_crashed]
        if failed:
            lines.append("    - failures among reported runs: " + "; ".join(
                f"`{a}` {d} diverged, {c} crashed" for a, d, c in failed) + ".")
    return [*lines, ""]


def runs_lines(study: Study, selections: dict[str, Selection], requested_seeds: list[int] | None) -> list[str]:
    """Which runs are reported, seed split of hyperparameter sweeps and failure counts."""
    lines = ["## Runs", "", "| learner | arm | runs reported | seeds | finished | diverged | crashed | setting |",
             "|---|---|---|---|---|---|---|---|"]
    for learner, sel in selections.items():
        for arm in sel.arms:
            runs = sel.runs[arm]
            lines.append(f"| {learner} | {arm} | {len(runs)} | {', '.join(str(r.seed) for r in runs)} | "
                         f"{sum(not r.failed for r in runs)} | {sum(r.status == 'diverged' for r in runs)} | "
                         f"{sum(r.status == 'crashed' for r in runs)} | {sel.chosen[arm] or 'as run'} |")
    lines.append("")
    for learner, sel in selections.items():
        if sel.swept_keys:
            lines.append(
                f"- **{learner}** sweeps {', '.join(f'`{k}`' for k in sel.swept_keys)}: each arm is shown at its own "
                f"best setting, chosen by IQM final success on selection seeds {sel.selection_seeds}; the numbers "
                f"here come only from the other seeds {sel.report_seeds}.")
        else:
            note = " (`--selection-seeds` unused)" if requested_seeds else ""
            lines.append(f"- **{learner}**: no hyperparameter sweep; every seed is reported{note}.")
    if study.unreadable:
        lines.append(f"- Folders without a config.yaml, not read as runs: {', '.join(study.unreadable)}.")
    return [*lines, ""]


def _seed_warning(measures: dict[str, dict[str, ArmMeasures]]) -> list[str]:
    """The few-seeds warning for the smallest arm, as a note block (empty when there are enough runs)."""
    warning = few_seeds_warning(min(m.n_runs for ms in measures.values() for m in ms.values()))
    return [f"> {warning}", ""] if warning else []


def _write_figure(fig, out: Path, name: str) -> str:
    figures.save_png(fig, out / name)
    return f"![{name.removesuffix('.png')}]({name})"


def performance_lines(measures: dict[str, dict[str, ArmMeasures]], threshold: float, out: Path) -> list[str]:
    """Learning curves, final scores, improvement over none, steps to threshold, profiles, overestimation."""
    def panels(attr: str) -> dict:
        return {lr: {a: getattr(m, attr) for a, m in ms.items() if getattr(m, attr) is not None}
                for lr, ms in measures.items()}

    lines = ["## Learning curves", "",
             "Greedy evaluation on the task's own reward: mean over the reported runs, shaded 95% percentile "
             "bootstrap interval over runs.", "", *_seed_warning(measures)]
    lines.append(_write_figure(figures.band_figure(panels("success"), figures.STEPS_LABEL, figures.SUCCESS_LABEL,
                                                   ylim=(-0.03, 1.03)), out, "curves_success.png"))
    lines.append("")
    lines.append(_write_figure(figures.band_figure(panels("discounted_return"), figures.STEPS_LABEL,
                                                   figures.RETURN_LABEL), out, "curves_return.png"))
    lines += ["", "## Final performance", "",
              "Interquartile mean (IQM) over runs of the last evaluation, with 95% percentile bootstrap intervals.", "",
              "| learner | arm | runs | IQM final success rate | IQM final discounted return |",
              "|---|---|---|---|---|"]
    rows = [(lr, a, m) for lr, ms in measures.items() for a, m in ms.items()]
    for lr, a, m in rows:
        lines.append(f"| {lr} | {a} | {m.n_runs} | {_interval(m.iqm_success)} | {_interval(m.iqm_return, 3)} |")
    lines += ["", _write_figure(figures.interval_figure([
        ("IQM final success rate (fraction)", {(lr, a): m.iqm_success for lr, a, m in rows}),
        ("IQM final discounted return (unitless)", {(lr, a): m.iqm_return for lr, a, m in rows})]),
        out, "final_scores.png"), ""]
    improvements = [(lr, a, m) for lr, a, m in rows if m.improvement_success is not None]
    lines += ["## Probability of improvement over `none`", "",
              "P(a run of the arm scores higher than a run of `none`, ties counting half), on final scores, with "
              "95% percentile bootstrap intervals (runs of both arms resampled).", ""]
    if improvements:
        lines += ["| learner | arm | on final success rate | on final discounted return | verdict (success) |",
                  "|---|---|---|---|---|"]
        lines += [f"| {lr} | {a} | {_interval(m.improvement_success)} | {_interval(m.improvement_return)} | "
                  f"{_verdict(m.improvement_success)} |" for lr, a, m in improvements]
        lines += ["", _write_figure(figures.interval_figure([
            ("P(improvement over none), final success", {(lr, a): m.improvement_success for lr, a, m in improvements}),
            ("P(improvement over none), final discounted return",
             {(lr, a): m.improvement_return for lr, a, m in improvements})], reference=0.5, xlim=(-0.02, 1.02)),
            out, "improvement.png")]
    else:
        lines.append("No learner has both a `none` arm and a shaped arm: nothing to compare.")
    lines += ["", f"## Steps to a success rate of {threshold:g}", "",
              "First evaluation step at which a run's success rate reaches the threshold. Runs that never reach it "
              "(censored) count at the budget, so a median with half or more runs censored is a lower bound.", "",
              "| learner | arm | runs | reached | censored at budget | budget | median steps |",
              "|---|---|---|---|---|---|---|"]
    lines += [f"| {lr} | {a} | {m.n_runs} | {int(m.reached.sum())} | {m.n_censored} | {_steps(m.budget)} | "
              f"{_median_steps(m)} |" for lr, a, m in rows]
    lines += ["", "## Performance profiles", "",
              "Fraction of runs whose final success rate exceeds tau, with a 95% bootstrap band.", "",
              _write_figure(figures.band_figure(panels("profile"), "tau (final success rate threshold)",
                                                "fraction of runs with final success > tau", ylim=(-0.03, 1.03)),
                            out, "profiles.png"),
              "", "## Overestimation", "",
              "Predicted value of the start states (max over actions of the learned Q, averaged) minus the discounted "
              "return the same greedy evaluation episodes earned on the training reward: above 0 the learner "
              "overestimates. Mean over finished runs (diverged and crashed runs have no trustworthy Q) with a 95% "
              "bootstrap interval.", ""]
    over = panels("overestimation")
    if any(over.values()):
        lines.append(_write_figure(figures.band_figure(over, figures.STEPS_LABEL,
                                                       "predicted minus achieved discounted return", zero_line=True),
                                   out, "overestimation.png"))
    else:
        lines.append("No finished run recorded the start-state predictions.")
    return [*lines, ""]


def _html_page(text: str, title: str, out: Path) -> str:
    """The HTML page of ``text``, its links to other reports pointing at their HTML pages."""
    page = markdown_to_html(text, title, out)
    return _REPORT_LINK.sub(lambda m: f'<a href="{m.group(2)}{REPORT_HTML}">{m.group(1)}</a>', page)


def _write_pages(lines: list[str], title: str, out: Path) -> Path:
    text = "\n".join(lines).rstrip() + "\n"
    md_path = out / REPORT_MD
    atomic_write_text(md_path, text)
    atomic_write_text(out / REPORT_HTML, _html_page(text, f"qlab report: {title}", out))
    return md_path


def write_report(
    study: Study, out: Path, title: str, threshold: float, selection_seeds: list[int] | None, grid: int,
    diagnostics: bool, context: list[str] | None = None,
) -> dict[str, dict[str, ArmMeasures]]:
    """Write the full report of ``study`` (runs of one task setting) into ``out``; returns its measures.

    ``context`` lines follow the caution (e.g. which task setting this is).
    """
    out.mkdir(parents=True, exist_ok=True)
    selections = {lr: select(study, lr, selection_seeds) for lr in study.learners()}
    measures = {lr: learner_measures(sel, threshold) for lr, sel in selections.items()}
    lines = [f"# Comparison report: {title}", "", CAUTION, "", *(context or [])]
    lines += summary_lines(study, measures, threshold)
    lines += _seed_warning(measures)
    lines += runs_lines(study, selections, selection_seeds)
    lines += performance_lines(measures, threshold, out)
    if diagnostics:
        lines += exact.diagnostics_lines(study, selections, grid, out)
    else:
        lines += ["## Q-function diagnostics", "", "Skipped (`--no-diagnostics`).", ""]
    _write_pages(lines, title, out)
    return measures


def _figure_key(settings: list[TaskSetting]) -> str | None:
    """The one varying task key when its values lie on a number line at distinct points; else None."""
    keys = {k for s in settings for k in s.values}
    if len(keys) != 1:
        return None
    key = keys.pop()
    xs = [position(s.values[key]) for s in settings]
    return key if None not in xs and len(set(xs)) == len(xs) else None


def settings_figure(
    settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], key: str, threshold: float,
) -> Figure:
    """Median steps to threshold against the task key's value (list midpoints), one panel per learner.

    Filled markers: reached by more than half the runs; hollow: a lower bound (censored at the budget).
    """
    learners = sorted({lr for ms in measures for lr in ms})
    fig = Figure(figsize=(figures.PANEL[0] * len(learners), figures.PANEL[1] + 0.3), layout="constrained")
    FigureCanvasAgg(fig)
    xs = [position(s.values[key]) for s in settings]
    for ax, learner in zip(fig.subplots(1, len(learners), squeeze=False)[0], learners, strict=True):
        arms = sorted({a for ms in measures for a in ms.get(learner, {})}, key=arm_sort_key)
        for arm in arms:
            points = [(x, ms[learner][arm]) for x, ms in zip(xs, measures, strict=True) if arm in ms.get(learner, {})]
            colour = figures.arm_colour(arm)
            x = [p for p, _ in points]
            y = [m.median_threshold_steps() for _, m in points]
            bound = [2 * m.n_censored >= m.n_runs for _, m in points]
            ax.plot(x, y, color=colour, linewidth=1.6, label=arm)
            ax.scatter(x, y, s=30, zorder=3, edgecolors=colour, linewidths=1.4,
                       facecolors=["white" if b else colour for b in bound])
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(True, axis="y", color="#e4e4e4", linewidth=0.8)
        ax.set_axisbelow(True)
        ax.set_ylim(bottom=0)
        ax.set_xticks(xs, [f"{x:g}" for x in xs])
        ax.tick_params(labelsize=8)
        ranged = any(isinstance(s.values[key], tuple) for s in settings)
        ax.set_xlabel(f"{key} (midpoint of the range)" if ranged else key, fontsize=8.5)
        ax.set_ylabel(f"median environment steps to success >= {threshold:g}", fontsize=8.5)
        ax.set_title(f"{learner} (hollow: lower bound)", loc="left", fontsize=9.5, fontweight="bold")
        ax.legend(fontsize=7.5, frameon=False)
    return fig


def overview_lines(
    study: Study, settings: list[TaskSetting], measures: list[dict[str, dict[str, ArmMeasures]]], threshold: float,
    out: Path,
) -> list[str]:
    """The top-level report of a study with several task settings: the settings, linked, and one table across them."""
    keys = sorted({k for s in settings for k in s.values})
    shown = ", ".join(f"`{k}`" for k in keys)
    lines = [f"# Comparison report: {study.name}", "", CAUTION, "",
             f"{len(study.runs)} runs read in {len(settings)} task settings: the runs differ in {shown}. Different "
             "task settings are different problems, so each has its own full report and nothing is chosen across "
             "them (a hyperparameter sweep, if any, is resolved within each setting).", "", "## Task settings", ""]
    for s in settings:
        n_div = sum(r.status == "diverged" for r in s.study.runs)
        n_crash = sum(r.status == "crashed" for r in s.study.runs)
        lines.append(f"- [{s.folder}]({s.folder}/{REPORT_MD}): {s.label}; {len(s.study.runs)} runs "
                     f"({', '.join(s.study.learners())}; arms {', '.join(s.study.arms())}), {n_div} diverged, "
                     f"{n_crash} crashed or unfinished.")
    lines += ["", "## Across task settings", "",
              f"Per learner and arm, in each task setting (columns by {shown}): the interquartile mean (IQM) of the "
              f"final success rate over the reported runs, and the median environment steps to a success rate >= "
              f"{threshold:g}. Runs that never reach it count at the budget; `>=` marks a lower bound (half or more "
              f"of the runs never reached it). Failure scores: {FAILURE_RULE}. Intervals and the rest are in each "
              "setting's report.", ""]
    lines += _seed_warning({f"{i}/{lr}": ms for i, m in enumerate(measures) for lr, ms in m.items()})
    header = "| learner | arm | " + " | ".join(f"{s.short_label}: IQM final success | {s.short_label}: median steps"
                                               for s in settings) + " |"
    lines += [header, "|---|---|" + "---|---|" * len(settings)]
    pairs = sorted({(lr, a) for m in measures for lr, ms in m.items() for a in ms},
                   key=lambda p: (p[0], arm_sort_key(p[1])))
    for lr, arm in pairs:
        cells = []
        for m in measures:
            am = m.get(lr, {}).get(arm)
            cells += [f"{am.iqm_success.value:.2f}", _median_steps(am)] if am else ["not run", "not run"]
        lines.append(f"| {lr} | {arm} | " + " | ".join(cells) + " |")
    lines.append("")
    key = _figure_key(settings)
    if key is not None:
        lines.append(_write_figure(settings_figure(settings, measures, key, threshold), out, SETTINGS_FIGURE))
    else:
        lines.append("No figure across settings: it needs exactly one varying task key whose values are numbers or "
                     "lists of numbers (drawn at their midpoints) at distinct points.")
    lines.append("")
    if study.unreadable:
        lines += [f"- Folders without a config.yaml, not read as runs: {', '.join(study.unreadable)}.", ""]
    return lines


def build_report(
    study_dir: str | Path, out_dir: str | Path | None = None, threshold: float = 0.5,
    selection_seeds: list[int] | None = None, grid: int = 61, diagnostics: bool = True,
) -> Path:
    """Write ``report.md``, ``report.html`` and the PNG figures for the study; returns the report.md path.

    With several task settings, each gets a full report in a subfolder of ``out_dir`` named after
    it, and the top-level report links them and compares the arms across settings.
    """
    if not 0.0 <= threshold <= 1.0:
        raise ValueError(f"threshold must lie in [0, 1] (a success rate), got {threshold!r}")
    if int(grid) != grid or grid < 2:
        raise ValueError(f"grid must be an integer >= 2 (nodes per axis), got {grid!r}")
    study = load_study(study_dir)
    if not study.runs:
        raise ValueError(f"study folder {str(study.path)!r} holds no run folders (with a config.yaml)")
    out = Path(out_dir) if out_dir is not None else study.path
    out.mkdir(parents=True, exist_ok=True)
    settings = split_by_task(study)
    if len(settings) == 1:
        write_report(study, out, study.name, threshold, selection_seeds, grid, diagnostics)
        return out / REPORT_MD
    for s in settings:
        if (out / s.folder / "config.yaml").exists():
            raise ValueError(f"out_dir must not hold a run folder named like a task setting's report, got "
                             f"{str(out / s.folder)!r}")
    measures = []
    for s in settings:
        context = [f"Task setting: {s.label} ({len(settings)} settings in study {study.name}; overview and "
                   f"comparison across settings: [{study.name}](../{REPORT_MD})).", ""]
        measures.append(write_report(s.study, out / s.folder, f"{study.name}, {s.label}", threshold,
                                     selection_seeds, grid, diagnostics, context))
    return _write_pages(overview_lines(study, settings, measures, threshold, out), study.name, out)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="qlab-report", description="Comparison report of a qlab study folder.")
    p.add_argument("study", type=Path, help="study folder (one folder per run)")
    p.add_argument("--out", type=Path, default=None, help="where to write the report (default: the study folder)")
    p.add_argument("--threshold", type=float, default=0.5, help="success rate for steps-to-threshold (default 0.5)")
    p.add_argument("--selection-seeds", default=None,
                   help="comma list of seeds that choose each arm's best setting in a hyperparameter sweep "
                        "(default: the lowest-numbered half of the seeds)")
    p.add_argument("--grid", type=int, default=61, help="grid nodes per axis of the exact Dock reference (default 61)")
    p.add_argument("--no-diagnostics", action="store_true", help="skip the exact Q-function diagnostics and audit")
    return p


def main(argv: list[str] | None = None) -> int:
    """``qlab-report``: write the comparison report of a study folder; 0 on success, 2 on bad input."""
    args = _parser().parse_args(argv)
    try:
        path = build_report(args.study, args.out, args.threshold, parse_seeds(args.selection_seeds), args.grid,
                            not args.no_diagnostics)
    except ValueError as err:
        print(f"qlab-report: error: {err}", file=sys.stderr)
        return 2
    print(f"report written: {path} and {path.with_name(REPORT_HTML)}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
