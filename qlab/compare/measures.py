"""The numbers a report shows for one learner's arms: curves, final scores, improvement, speed.

Everything is computed on the reported runs of a :class:`~qlab.compare.selection.Selection`,
failed runs included as failures (see :mod:`qlab.compare.runs`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qlab.compare import stats
from qlab.compare.runs import START_AT_POTENTIAL_ARM, UNFINISHED, Run, eval_matrix, eval_steps
from qlab.compare.selection import Selection

CONFIDENCE = 0.95
#: the shaped arm set against its control arm (Q started at Phi, trained on the task's own reward)
POTENTIAL_ARM = "potential"
#: tau grid of the performance profiles (final success rate is a fraction)
PROFILE_TAUS = np.linspace(0.0, 1.0, 101)
#: a run collapsed when it ends having lost more than this share of its best (see :func:`stats.loss_from_best`)
COLLAPSE_LOSS = 0.5


@dataclass
class Band:
    """A curve with its pointwise interval: mean (or other statistic), low and high at each x."""

    x: np.ndarray
    centre: np.ndarray
    low: np.ndarray
    high: np.ndarray


@dataclass
class Estimate:
    """A statistic with its percentile bootstrap interval."""

    value: float
    low: float
    high: float

    @property
    def covers_half(self) -> bool:
        """Whether the interval includes 0.5 (a probability of improvement not distinguishable from a tie)."""
        return self.low <= 0.5 <= self.high


@dataclass
class ArmMeasures:
    """One (learner, arm): counts, curves and final statistics over its reported runs."""

    arm: str
    seeds: list[int]
    n_diverged: int
    n_crashed: int
    success: Band
    discounted_return: Band
    overestimation: Band | None  # None when no finished run recorded q_start
    final_success: np.ndarray  # per run (failures 0)
    final_return: np.ndarray
    iqm_success: Estimate
    iqm_return: Estimate
    threshold_steps: np.ndarray  # per run, inf for a run that never reached the threshold (censored)
    steps_interval: tuple[float, float] | None  # bootstrap interval of the median steps; None when censored
    budget: int
    profile: Band
    collapse_score: str  # the evaluation tag the collapse is measured on (see collapse_score)
    loss: np.ndarray  # per run, the share of its best lost by the end (stats.loss_from_best)
    improvement_success: Estimate | None = None  # P(arm > none) on final success; None for none itself
    improvement_return: Estimate | None = None
    speed_up: stats.MedianRatio | None = None  # median steps of none / of this arm; None for none itself

    @property
    def n_runs(self) -> int:
        return len(self.seeds)

    @property
    def n_collapsed(self) -> int:
        """Runs that ended having lost more than :data:`COLLAPSE_LOSS` of their best."""
        return int((self.loss > COLLAPSE_LOSS).sum())

    @property
    def reached(self) -> np.ndarray:
        """Per run, whether it reached the threshold within the budget."""
        return np.isfinite(self.threshold_steps)

    @property
    def n_censored(self) -> int:
        return int(np.isinf(self.threshold_steps).sum())

    @property
    def median_censored(self) -> bool:
        """Whether half or more of the runs never reached the threshold: the median is then only "> budget"."""
        return stats.median_is_censored(self.threshold_steps)

    def median_threshold_steps(self) -> float:
        """Median steps to threshold, censored runs counting as never: ``inf`` when :attr:`median_censored`."""
        return float(np.median(self.threshold_steps))


@dataclass
class ArmContrast:
    """One arm set against another arm: P(``arm`` beats ``other``) on final scores, with intervals."""

    arm: ArmMeasures
    other: ArmMeasures
    improvement_success: Estimate  # P(a run of arm scores higher than a run of other), ties half
    improvement_return: Estimate
    speed_up: stats.MedianRatio  # median steps of other / median steps of arm

    @property
    def iqm_success_difference(self) -> float:
        """IQM final success of ``arm`` minus that of ``other``."""
        return self.arm.iqm_success.value - self.other.iqm_success.value


def _band(x: np.ndarray, matrix: np.ndarray, seed: int) -> Band:
    low, high = stats.bootstrap_ci(matrix, np.mean, CONFIDENCE, seed=seed)
    return Band(x, matrix.mean(axis=0), low, high)


def iqm_estimate(values: np.ndarray, seed: int = 0) -> Estimate:
    """IQM over runs with its percentile bootstrap interval."""
    low, high = stats.bootstrap_ci(values, stats.iqm, CONFIDENCE, seed=seed)
    return Estimate(float(stats.iqm(values)), float(low), float(high))


def _improvement(x: np.ndarray, y: np.ndarray, seed: int) -> Estimate:
    low, high = stats.probability_of_improvement_ci(x, y, CONFIDENCE, seed=seed)
    return Estimate(stats.probability_of_improvement(x, y), low, high)


def speed_up(base: ArmMeasures, arm: ArmMeasures, seed: int = 0) -> stats.MedianRatio:
    """Median steps to threshold of ``base`` over those of ``arm`` (above 1: ``arm`` is faster), with its interval.

    A run that meets the threshold at step 0 counts as 1 step (a ratio needs positive steps); a censored
    median is known to exceed the smaller of the two budgets (see :func:`stats.median_ratio`).
    """
    return stats.median_ratio(np.maximum(base.threshold_steps, 1.0), np.maximum(arm.threshold_steps, 1.0),
                              min(base.budget, arm.budget), CONFIDENCE, seed=seed)


def _overestimation(runs: list[Run], steps: np.ndarray, seed: int) -> Band | None:
    finished = [r for r in runs if not r.failed and "q_start" in r.evals and "trained_discounted_return" in r.evals]
    if not finished:
        return None
    gap = eval_matrix(finished, "q_start", steps) - eval_matrix(finished, "trained_discounted_return", steps)
    keep = np.all(np.isfinite(gap), axis=0)
    return _band(steps[keep], gap[:, keep], seed)


def collapse_score(runs: list[Run]) -> str:
    """The score a collapse is measured on: ``success`` when any of ``runs`` ever evaluated a success above 0,
    else ``discounted_return`` (a task without a success signal, or a setting no run ever solved)."""
    solved = any(np.any(r.evals["success"][1] > 0) for r in runs if "success" in r.evals)
    return "success" if solved else "discounted_return"


def _loss(curves: np.ndarray, final: np.ndarray, score: str) -> np.ndarray:
    """Share of the best lost: success rates counted up from 0, returns over each run's own range."""
    return stats.loss_from_best(curves, final, 0.0 if score == "success" else None)


def arm_measures(
    runs: list[Run], steps: np.ndarray, threshold: float, seed: int = 0, score: str = "success",
) -> ArmMeasures:
    """Measures of one arm's reported runs on the evaluation ``steps`` grid; collapses measured on ``score``."""
    success = eval_matrix(runs, "success", steps)
    ret = eval_matrix(runs, "discounted_return", steps)
    keep = np.all(np.isfinite(success), axis=0) & np.all(np.isfinite(ret), axis=0)
    final_success = np.array([r.final["success"] for r in runs])
    final_return = np.array([r.final["discounted_return"] for r in runs])
    scored = (success, final_success) if score == "success" else (ret, final_return)
    budget = max(r.budget for r in runs)
    first = stats.steps_to_threshold(steps[keep], success[:, keep], threshold, budget)
    p_low, p_high = stats.performance_profile_ci(final_success, PROFILE_TAUS, CONFIDENCE, seed=seed)
    return ArmMeasures(
        arm=runs[0].arm,
        seeds=[r.seed for r in runs],
        n_diverged=sum(r.status == "diverged" for r in runs),
        n_crashed=sum(r.status in UNFINISHED for r in runs),
        success=_band(steps[keep], success[:, keep], seed),
        discounted_return=_band(steps[keep], ret[:, keep], seed),
        overestimation=_overestimation(runs, steps, seed),
        final_success=final_success,
        final_return=final_return,
        iqm_success=iqm_estimate(final_success, seed),
        iqm_return=iqm_estimate(final_return, seed),
        threshold_steps=first,
        steps_interval=stats.median_ci(first, CONFIDENCE, seed=seed),
        budget=budget,
        profile=Band(PROFILE_TAUS, stats.performance_profile(final_success, PROFILE_TAUS), p_low, p_high),
        collapse_score=score,
        loss=_loss(*scored, score),
    )


def learner_measures(
    selection: Selection, threshold: float, seed: int = 0, score: str = "success",
) -> dict[str, ArmMeasures]:
    """Measures of every arm of a learner (collapses on ``score``); arms other than ``none`` get P(improvement)."""
    all_runs = [r for runs in selection.runs.values() for r in runs]
    steps = eval_steps(all_runs)
    out = {arm: arm_measures(selection.runs[arm], steps, threshold, seed, score) for arm in selection.arms}
    base = out.get("none")
    if base is not None:
        for arm, m in out.items():
            if arm != "none":
                m.improvement_success = _improvement(m.final_success, base.final_success, seed)
                m.improvement_return = _improvement(m.final_return, base.final_return, seed)
                m.speed_up = speed_up(base, m, seed)
    return out


def contrast(arm: ArmMeasures, other: ArmMeasures, seed: int = 0) -> ArmContrast:
    """``arm`` set against ``other`` on final success and final discounted return."""
    return ArmContrast(arm, other, _improvement(arm.final_success, other.final_success, seed),
                       _improvement(arm.final_return, other.final_return, seed), speed_up(other, arm, seed))


def potential_against_start(measures: dict[str, dict[str, ArmMeasures]], seed: int = 0) -> dict[str, ArmContrast]:
    """Per learner that has both arms: ``potential`` set against ``none + Q started at Phi``."""
    return {lr: contrast(ms[POTENTIAL_ARM], ms[START_AT_POTENTIAL_ARM], seed) for lr, ms in measures.items()
            if POTENTIAL_ARM in ms and START_AT_POTENTIAL_ARM in ms}
