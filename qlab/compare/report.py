"""The comparison report of a study: ``report.md``, a self-contained ``report.html`` and PNG figures.

``qlab-report results/<study>`` reads every run of the study (:mod:`qlab.compare.runs`), picks
the reported runs (:mod:`qlab.compare.selection`), computes the statistics
(:mod:`qlab.compare.measures`), draws the figures (:mod:`qlab.compare.figures`), adds exact
Q-function diagnostics and the shaping audit where an exact answer exists
(:mod:`qlab.compare.exact`) and writes the report beside the figures.

Task settings are never compared as if they were hyperparameters: when the runs differ in a
``task.*`` key, each task setting gets its own full report in a subfolder named after it, below a
top-level overview across the settings (:mod:`qlab.compare.overview`).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from qlab.compare import exact, figures
from qlab.compare.markup import markdown_to_html, md_literal
from qlab.compare.measures import (
    COLLAPSE_LOSS,
    POTENTIAL_ARM,
    ArmContrast,
    ArmMeasures,
    Estimate,
    collapse_score,
    learner_measures,
    potential_against_start,
)
from qlab.compare.overview import (
    CAUTION,
    CENSORING_RULE,
    SPEED_UP_RULE,
    failure_counts,
    folder_notes,
    median_steps,
    overview_lines,
    seed_warning,
    speed_up_cell,
)
from qlab.compare.runs import FAILURE_RULE, REPORT_MD, START_AT_POTENTIAL_ARM, Study, load_study, split_by_task
from qlab.compare.selection import Selection, parse_seeds, select
from qlab.compare.stats import LOWER_BOUND, UNDETERMINED, UPPER_BOUND, MedianRatio
from qlab.recording import atomic_write_text
from qlab.validation import require_int, require_within

REPORT_HTML = "report.html"


def _interval(e: Estimate, digits: int = 2) -> str:
    return f"{e.value:.{digits}f} [{e.low:.{digits}f}, {e.high:.{digits}f}]"


def _row_start(learner: str, arm: str) -> str:
    """The learner and arm cells that start a table row, names escaped."""
    return f"| {md_literal(learner)} | {md_literal(arm)} |"


def _verdict(e: Estimate) -> str:
    if e.covers_half:
        return "not distinguishable (interval covers 0.5)"
    return "better than `none` (interval above 0.5)" if e.low > 0.5 else "worse than `none` (interval below 0.5)"


def _speed_ratio(r: MedianRatio, base: str) -> str:
    """How many times fewer steps an arm needs than ``base`` to reach the threshold (median runs), and how sure."""
    base_arm = md_literal(base, code=True)
    if r.kind == UPPER_BOUND:
        return (f"reaches the threshold in at most half of its runs within the budget (speed-up over {base_arm} "
                f"below {r.value:.2f})")
    if r.kind == UNDETERMINED:
        return f"neither it nor {base_arm} reaches the threshold in more than half of the runs: speed undetermined"
    if r.kind == LOWER_BOUND:
        return (f"more than {r.value:.1f} times fewer steps than {base_arm} (half or more {base_arm} runs never "
                "reached the threshold within the budget)")
    if r.value == 1.0:
        head = f"the same median steps as {base_arm}"
    elif r.value > 1.0:
        head = f"{r.value:.1f} times fewer steps than {base_arm}"
    else:
        head = f"{1.0 / r.value:.1f} times more steps than {base_arm}"
    return f"{head} (median runs; speed-up {speed_up_cell(r)}, 95% interval)"


def _better(e: Estimate, c: ArmContrast) -> str | None:
    """The arm of ``c`` that ``e`` (P(``c.arm`` beats ``c.other``)) shows better; None when its interval covers 0.5."""
    if e.covers_half:
        return None
    return c.arm.arm if e.low > 0.5 else c.other.arm


def _side(better: str | None, c: ArmContrast) -> str:
    if better is None:
        return "indistinguishable (interval covers 0.5)"
    return f"{md_literal(better, code=True)} better (interval {'above' if better == c.arm.arm else 'below'} 0.5)"


def _reading(c: ArmContrast) -> str:
    """One line: whether shaping with Phi and starting Q at Phi could be told apart, and which arm is better."""
    on_success, on_return = _better(c.improvement_success, c), _better(c.improvement_return, c)
    if on_success is None and on_return is None:
        return "indistinguishable (interval covers 0.5): consistent with Wiewiora (2003)"
    if on_success == on_return:
        side = "above" if on_success == c.arm.arm else "below"
        return (f"{md_literal(on_success, code=True)} better on final success and on final discounted return "
                f"(intervals {side} 0.5)")
    return f"on final success {_side(on_success, c)}; on final discounted return {_side(on_return, c)}"


def _fastest(ms: dict[str, ArmMeasures]) -> tuple[ArmMeasures, list[str]]:
    """The arm with the fewest median steps to threshold (ties: higher IQM final scores) and arms tied with it."""
    fast = min(ms.values(), key=lambda m: (m.median_threshold_steps(), -m.iqm_success.value, -m.iqm_return.value))
    tied = [a for a, m in ms.items() if a != fast.arm and m.median_threshold_steps() == fast.median_threshold_steps()]
    return fast, tied


def summary_lines(
    study: Study, measures: dict[str, dict[str, ArmMeasures]], contrasts: dict[str, ArmContrast], threshold: float,
) -> list[str]:
    """The plain-language summary: per learner the fastest arm, by how much, and how sure.

    ``contrasts`` (:func:`~qlab.compare.measures.potential_against_start`) add a line per learner in it.
    """
    lines = ["## Summary", ""]
    n_div, n_crash = failure_counts(study.runs)
    lines.append(f"- {len(study.runs)} runs read: {n_div} diverged, {n_crash} crashed, unfinished or damaged "
                 f"(failure scores: {FAILURE_RULE}).")
    for learner, ms in measures.items():
        fast, tied = _fastest(ms)
        name, code = md_literal(learner), {a: md_literal(a, code=True) for a in ms}
        ties = f" (tied on median steps with {', '.join(code[a] for a in tied)})" if tied else ""
        head = (f"- **{name}**: {code[fast.arm]} learns fastest{ties}: median {median_steps(fast)} environment steps "
                f"to a success rate >= {threshold:g} ({fast.n_censored} of {fast.n_runs} runs never reached it).")
        if fast.median_censored:
            head = (f"- **{name}**: no arm reaches a success rate >= {threshold:g} in more than half of its runs "
                    "within the budget.")
        lines.append(head)
        base = ms.get("none")
        for arm, m in ms.items():
            if base is None or arm == "none" or m.improvement_success is None or m.speed_up is None:
                continue
            lines.append(
                f"    - {code[arm]} against `none`: {_speed_ratio(m.speed_up, 'none')}; IQM final success "
                f"{m.iqm_success.value:.2f} vs {base.iqm_success.value:.2f} "
                f"({m.iqm_success.value - base.iqm_success.value:+.2f}); "
                f"P({code[arm]} beats `none` on final success) = {_interval(m.improvement_success)}: "
                f"{_verdict(m.improvement_success)}.")
        if learner in contrasts:
            c = contrasts[learner]
            lines.append(
                f"    - {code[c.arm.arm]} against {code[c.other.arm]}: {_speed_ratio(c.speed_up, c.other.arm)}; "
                f"IQM final success {c.arm.iqm_success.value:.2f} vs {c.other.iqm_success.value:.2f} "
                f"({c.iqm_success_difference:+.2f}); "
                f"P({code[c.arm.arm]} beats {code[c.other.arm]}) on final success {_interval(c.improvement_success)}, "
                f"on final discounted return {_interval(c.improvement_return)}: {_reading(c)}.")
        failed = [(a, m.n_diverged, m.n_crashed) for a, m in ms.items() if m.n_diverged or m.n_crashed]
        if failed:
            lines.append("    - failures among reported runs: " + "; ".join(
                f"{code[a]} {d} diverged, {c} crashed" for a, d, c in failed) + ".")
    return [*lines, ""]


def runs_lines(study: Study, selections: dict[str, Selection], requested_seeds: list[int] | None) -> list[str]:
    """Which runs are reported, seed split of hyperparameter sweeps and failure counts."""
    lines = ["## Runs", "", "| learner | arm | runs reported | seeds | finished | diverged | crashed | setting |",
             "|---|---|---|---|---|---|---|---|"]
    for learner, sel in selections.items():
        for arm in sel.arms:
            runs = sel.runs[arm]
            n_div, n_crash = failure_counts(runs)
            lines.append(f"{_row_start(learner, arm)} {len(runs)} | "
                         f"{', '.join(str(r.seed) for r in runs)} | {sum(not r.failed for r in runs)} | {n_div} | "
                         f"{n_crash} | {md_literal(sel.chosen[arm]) or 'as run'} |")
    lines.append("")
    for learner, sel in selections.items():
        if sel.swept_keys:
            keys = ", ".join(md_literal(k, code=True) for k in sel.swept_keys)
            lines.append(
                f"- **{md_literal(learner)}** sweeps {keys}: each arm is shown at its own "
                f"best setting, chosen by IQM final success on selection seeds {sel.selection_seeds}; the numbers "
                f"here come only from the other seeds {sel.report_seeds}.")
        else:
            note = " (`--selection-seeds` unused)" if requested_seeds else ""
            lines.append(f"- **{md_literal(learner)}**: no hyperparameter sweep; every seed is reported{note}.")
    return [*lines, *folder_notes(study), ""]


def against_start_lines(contrasts: dict[str, ArmContrast]) -> list[str]:
    """The section setting ``potential`` against ``none + Q started at Phi`` (empty when no learner has both)."""
    if not contrasts:
        return []
    shaped, start = f"`{POTENTIAL_ARM}`", f"`{START_AT_POTENTIAL_ARM}`"
    lines = ["## Potential shaping against Q started at Phi", "",
             f"{shaped} learns on the Phi-shaped reward, {start} on the task's own reward with Q started at the "
             "potential Phi. Wiewiora (2003) proves the two equivalent only for a true table fed the same experience, "
             "while here a binned learner holds one Q per cell (started at Phi of the cell centre, whereas the shaping "
             "bonus reads Phi at the exact state) and a featurised learner starts at a least-squares fit of Phi that "
             "its features need not span, so the two arms can learn differently. P(a run of "
             f"{shaped} scores higher than a run of {start}, ties counting half) on final scores, with 95% "
             "percentile bootstrap intervals (runs of both arms resampled); median steps to the threshold as below.",
             "",
             f"| learner | P({shaped} beats {start}), final success rate | same, final discounted return | "
             f"median steps, {shaped} / {start} | speed of {shaped} | IQM final success difference | reading |",
             "|---|---|---|---|---|---|---|"]
    lines += [f"| {md_literal(lr)} | {_interval(c.improvement_success)} | {_interval(c.improvement_return)} | "
              f"{median_steps(c.arm)} / {median_steps(c.other)} | {_speed_ratio(c.speed_up, c.other.arm)} | "
              f"{c.arm.iqm_success.value:.2f} - {c.other.iqm_success.value:.2f} = {c.iqm_success_difference:+.2f} | "
              f"{_reading(c)} |" for lr, c in contrasts.items()]
    return [*lines, ""]


#: what the collapse section says per score: why this score, and the rule on it
COLLAPSE_TEXT = {
    "success": (
        "the evaluated success rate (runs of this task setting report successes)",
        f"best is the highest success rate the run evaluated (during training or at the end); a run collapsed when "
        f"final < {COLLAPSE_LOSS:g} x best, with best > 0; the share lost is (best - final) / best"),
    "discounted_return": (
        "the evaluated discounted return, because no run of this task setting ever evaluated a success above 0 "
        "(a task without a success signal, or a setting never solved)",
        "returns may be negative, so the loss is measured over the run's own range: best and worst are the highest "
        "and lowest discounted return the run evaluated (during training or at the end), the share lost is "
        f"(best - final) / (best - worst), and a run collapsed when it exceeds {COLLAPSE_LOSS:g} (with best > worst)"),
}


def collapse_lines(measures: dict[str, dict[str, ArmMeasures]]) -> list[str]:
    """The section counting runs that ended having lost more than :data:`COLLAPSE_LOSS` of their best score."""
    score = next(m.collapse_score for ms in measures.values() for m in ms.values())
    why, rule = COLLAPSE_TEXT[score]
    lines = ["## Collapse after the best evaluation", "",
             f"How many runs ended having lost more than {COLLAPSE_LOSS:.0%} of the best score they reached, scored "
             f"on {why}: {rule}. Failed runs count with their failure scores.", "",
             "| learner | arm | runs | collapsed | share of the best lost, median over runs |", "|---|---|---|---|---|"]
    lines += [f"{_row_start(lr, a)} {m.n_runs} | {m.n_collapsed} | {np.median(m.loss):.2f} |"
              for lr, ms in measures.items() for a, m in ms.items()]
    return [*lines, ""]


def performance_lines(
    measures: dict[str, dict[str, ArmMeasures]], contrasts: dict[str, ArmContrast], threshold: float, out: Path,
) -> list[str]:
    """Curves, final scores, improvement over none, potential against Q at Phi, steps, profiles, overestimation."""
    def panels(attr: str) -> dict:
        return {lr: {a: getattr(m, attr) for a, m in ms.items() if getattr(m, attr) is not None}
                for lr, ms in measures.items()}

    lines = ["## Learning curves", "",
             "Greedy evaluation on the task's own reward: mean over the reported runs, shaded 95% percentile "
             "bootstrap interval over runs.", "", *seed_warning(measures)]
    lines.append(figures.save_figure(figures.band_figure(panels("success"), figures.STEPS_LABEL,
                                                         figures.SUCCESS_LABEL, ylim=(-0.03, 1.03)),
                                     out, "curves_success.png"))
    lines.append("")
    lines.append(figures.save_figure(figures.band_figure(panels("discounted_return"), figures.STEPS_LABEL,
                                                         figures.RETURN_LABEL), out, "curves_return.png"))
    lines += ["", "## Final performance", "",
              "Interquartile mean (IQM) over runs of the last evaluation, with 95% percentile bootstrap intervals.", "",
              "| learner | arm | runs | IQM final success rate | IQM final discounted return |",
              "|---|---|---|---|---|"]
    rows = [(lr, a, m) for lr, ms in measures.items() for a, m in ms.items()]
    for lr, a, m in rows:
        lines.append(f"{_row_start(lr, a)} {m.n_runs} | {_interval(m.iqm_success)} | {_interval(m.iqm_return, 3)} |")
    lines += ["", figures.save_figure(figures.interval_figure([
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
        lines += [f"{_row_start(lr, a)} {_interval(m.improvement_success)} | {_interval(m.improvement_return)} | "
                  f"{_verdict(m.improvement_success)} |" for lr, a, m in improvements]
        lines += ["", figures.save_figure(figures.interval_figure([
            ("P(improvement over none), final success", {(lr, a): m.improvement_success for lr, a, m in improvements}),
            ("P(improvement over none), final discounted return",
             {(lr, a): m.improvement_return for lr, a, m in improvements})], reference=0.5, xlim=(-0.02, 1.02)),
            out, "improvement.png")]
    else:
        lines.append("No learner has both a `none` arm and a shaped arm: nothing to compare.")
    lines += ["", *against_start_lines(contrasts), f"## Steps to a success rate of {threshold:g}", "",
              f"First evaluation step at which a run's success rate reaches the threshold. {CENSORING_RULE} The "
              "speed-ups in the summary and against Q started at Phi are the median steps of the base arm divided "
              f"by those of the arm (above 1 the arm is faster). {SPEED_UP_RULE}", "",
              "| learner | arm | runs | reached | never reached (censored) | budget | median steps |",
              "|---|---|---|---|---|---|---|"]
    lines += [f"{_row_start(lr, a)} {m.n_runs} | {int(m.reached.sum())} | {m.n_censored} | {m.budget:,.0f} | "
              f"{median_steps(m)} |" for lr, a, m in rows]
    lines += ["", "## Share of runs above a success threshold", "",
              "For every threshold on the final success, the share of runs that end above it, with a 95% "
              "bootstrap band.", "",
              figures.save_figure(figures.band_figure(panels("profile"), "threshold on final success",
                                                      "share of runs above the threshold", ylim=(-0.03, 1.03)),
                                  out, "profiles.png"),
              "", "## Overestimation", "",
              "Predicted value of the start states (max over actions of the learned Q, averaged) minus the discounted "
              "return the same greedy evaluation episodes earned on the training reward: above 0 the learner "
              "overestimates. Mean over finished runs (diverged and crashed runs have no trustworthy Q) with a 95% "
              "bootstrap interval.", ""]
    over = panels("overestimation")
    if any(over.values()):
        lines.append(figures.save_figure(figures.band_figure(over, figures.STEPS_LABEL,
                                                             "predicted minus achieved discounted return",
                                                             zero_line=True), out, "overestimation.png"))
    else:
        lines.append("No finished run recorded the start-state predictions.")
    return [*lines, ""]


def _write_pages(lines: list[str], title: str, out: Path) -> Path:
    text = "\n".join(lines).rstrip() + "\n"
    md_path = out / REPORT_MD
    atomic_write_text(md_path, text)
    atomic_write_text(out / REPORT_HTML, markdown_to_html(text, f"qlab report: {title}", out))
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
    score = collapse_score(study.runs)
    measures = {lr: learner_measures(sel, threshold, score=score) for lr, sel in selections.items()}
    lines = [f"# Comparison report: {md_literal(title)}", "", CAUTION, "", *(context or [])]
    contrasts = potential_against_start(measures)
    lines += summary_lines(study, measures, contrasts, threshold)
    lines += seed_warning(measures)
    lines += runs_lines(study, selections, selection_seeds)
    lines += performance_lines(measures, contrasts, threshold, out)
    lines += collapse_lines(measures)
    if diagnostics:
        lines += exact.diagnostics_lines(study, selections, grid, out)
    else:
        lines += ["## Q-function diagnostics", "", "Skipped (`--no-diagnostics`).", ""]
    _write_pages(lines, title, out)
    return measures


def build_report(
    study_dir: str | Path, out_dir: str | Path | None = None, threshold: float = 0.5,
    selection_seeds: list[int] | None = None, grid: int = 61, diagnostics: bool = True,
) -> Path:
    """Write ``report.md``, ``report.html`` and the PNG figures for the study; returns the report.md path.

    With several task settings, each gets a full report in a subfolder of ``out_dir`` named after
    it, and the top-level report links them and compares the arms across settings.
    """
    require_within("threshold", threshold, 0.0, 1.0, note="(a success rate)")
    require_int("grid", grid, 2, note="(nodes per axis)")
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
        name = md_literal(study.name)
        context = [f"Task setting: {md_literal(s.label)} ({len(settings)} settings in study {name}; overview and "
                   f"comparison across settings: [{name}](../{REPORT_MD})).", ""]
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
