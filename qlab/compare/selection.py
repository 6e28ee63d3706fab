"""Hyperparameter sweeps: pick each arm's best setting on selection seeds, report on the others.

A learner's runs sweep hyperparameters when any config key other than the seed, the shaping
keys, the task keys and the execution keys differs between them. Task keys (``task.*``) are not
hyperparameters: a different task setting is a different problem, never a setting to pick the
best of, so a study is split by task setting first (:func:`qlab.compare.runs.split_by_task`)
and :func:`select` refuses runs of several task settings. Each (learner, arm) is then compared at its
own best setting, chosen by the interquartile mean of final success on the selection seeds
(ties: final discounted return, then the setting's label), and reported only on the remaining
seeds, so the choice does not flatter the reported numbers. Without a sweep every seed is
reported.
"""

from __future__ import annotations

from dataclasses import dataclass

from qlab.compare.runs import Run, Study, arm_sort_key, task_keys
from qlab.compare.stats import iqm


@dataclass
class Selection:
    """Which runs the report shows for one learner, and how they were chosen."""

    learner: str
    swept_keys: list[str]  # empty: no sweep, every seed reported
    selection_seeds: list[int]  # empty without a sweep
    report_seeds: list[int]
    chosen: dict[str, str]  # arm -> label of its chosen setting ("" without a sweep)
    runs: dict[str, list[Run]]  # arm -> reported runs, sorted by seed

    @property
    def arms(self) -> list[str]:
        return sorted(self.runs, key=arm_sort_key)


def swept_keys(runs: list[Run]) -> list[str]:
    """Hyperparameter keys whose values differ between ``runs`` (never ``task.*``: see :meth:`Run.setting`).

    A key missing from some runs' configs is a setting added after they ran. Where the value those
    runs computed with is recorded (:data:`qlab.compare.runs.ADDED_SETTINGS`) the run carries it;
    otherwise the setting's default is taken to keep the earlier behaviour, so a missing key differs
    only where the runs that have it disagree among themselves.
    """
    settings = [r.setting() for r in runs]
    keys = sorted(set().union(*settings)) if settings else []
    return [k for k in keys if len({repr(s[k]) for s in settings if k in s}) > 1]


def setting_label(run: Run, keys: list[str]) -> str:
    """The swept keys of a run's setting, e.g. ``learner.step_size.start=0.2, gamma=0.99``."""
    setting = run.setting()
    return ", ".join(f"{k}={setting.get(k)!r}" for k in keys)


def parse_seeds(text: str | None) -> list[int] | None:
    """``"0,1,2"`` as a list of seeds; ``None`` or empty: no choice made."""
    if text is None or not text.strip():
        return None
    try:
        return sorted({int(part) for part in text.split(",") if part.strip()})
    except ValueError:
        raise ValueError(f"--selection-seeds must be a comma-separated list of integers, got {text!r}") from None


def split_seeds(seeds: list[int], selection: list[int] | None) -> tuple[list[int], list[int]]:
    """(selection seeds, report seeds); default selection: the lowest-numbered half of ``seeds``."""
    seeds = sorted(set(seeds))
    if selection is None:
        if len(seeds) < 2:
            raise ValueError(f"a hyperparameter sweep needs at least 2 seeds to split into selection and "
                             f"report seeds, got seeds {seeds}")
        chosen = seeds[: len(seeds) // 2]
    else:
        unknown = sorted(set(selection) - set(seeds))
        if unknown:
            raise ValueError(f"--selection-seeds must be among the study's seeds {seeds}, got unknown {unknown}")
        chosen = sorted(set(selection))
    report = [s for s in seeds if s not in chosen]
    if not chosen or not report:
        raise ValueError(f"--selection-seeds must leave both selection and report seeds among {seeds}, got {chosen}")
    return chosen, report


def _score(runs: list[Run]) -> tuple[float, float]:
    success = [r.final["success"] for r in runs]
    ret = [r.final["discounted_return"] for r in runs]
    return float(iqm(success)), float(iqm(ret))


def select(study: Study, learner: str, selection_seeds: list[int] | None = None) -> Selection:
    """The runs reported for ``learner``: every seed, or each arm's best setting on the report seeds."""
    runs = [r for r in study.runs if r.learner == learner]
    if not runs:
        raise ValueError(f"learner must be one of {study.learners()}, got {learner!r}")
    differing = task_keys(runs)
    if differing:
        raise ValueError(f"the runs of learner {learner!r} must share one task setting (split the study with "
                         f"split_by_task first), got differing task keys {differing}")
    keys = swept_keys(runs)
    arms = sorted({r.arm for r in runs}, key=arm_sort_key)
    if not keys:
        by_arm = {a: sorted((r for r in runs if r.arm == a), key=lambda r: r.seed) for a in arms}
        return Selection(learner, [], [], sorted({r.seed for r in runs}), dict.fromkeys(arms, ""), by_arm)
    chosen_seeds, report_seeds = split_seeds([r.seed for r in runs], selection_seeds)
    chosen, by_arm = {}, {}
    for arm in arms:
        groups: dict[str, list[Run]] = {}
        for r in runs:
            if r.arm == arm:
                groups.setdefault(setting_label(r, keys), []).append(r)
        scored = {label: _score([r for r in group if r.seed in chosen_seeds])
                  for label, group in groups.items() if any(r.seed in chosen_seeds for r in group)}
        if not scored:
            raise ValueError(f"arm {arm!r} of learner {learner!r} has no runs on the selection seeds {chosen_seeds}")
        best = max(sorted(scored), key=lambda label: scored[label])
        reported = sorted((r for r in groups[best] if r.seed in report_seeds), key=lambda r: r.seed)
        if reported:
            chosen[arm], by_arm[arm] = best, reported
    return Selection(learner, keys, chosen_seeds, report_seeds, chosen, by_arm)
