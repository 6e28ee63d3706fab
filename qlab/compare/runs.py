"""Load a study folder: every run's config, status, final numbers and evaluation curves.

A study folder holds one folder per run (names starting with ``.`` are skipped). A run is

* ``finished``: ``FINISHED`` marker present and ``summary.json`` status ``finished``;
* ``diverged``: marker present, summary status ``diverged`` (fails from ``diverged_at_step`` on);
* ``crashed``: no marker (killed or still running; fails after its last recorded step);
* ``damaged``: marker present but ``summary.json`` unreadable, or ``metrics.csv`` not the table
  the summary was written with (its SHA-256 differs); fails from step 0, its numbers unused.

Diverged and crashed runs are failures and stay in every statistic (the report counts them).
From its failure step on, and as its final scores, a failed run scores success 0 and, as its
discounted return, the lower of 0 and the worst return observed at the same evaluation step (the
final evaluation for the final score) among all runs of the same task setting:
``min(0, worst observed)``. A failure is thus never scored above the worst real run, even
where returns are negative (the linear-quadratic task), and never above 0. Values a failed run
recorded from its failure step on are not observations.

Runs of different task settings (``task.*`` keys) are different problems:
:func:`split_by_task` partitions a study by task setting.
"""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from omegaconf import DictConfig, OmegaConf

from qlab.config import flatten as flatten_config
from qlab.recording import MARKER, METRICS, SUMMARY, file_digest, read_metrics
from qlab.runfolder import read_summary
from qlab.runspec import is_storage_key, load_config, run_digest

#: statuses of runs that did not finish cleanly and did not diverge (counted together as crashed)
UNFINISHED = ("crashed", "damaged")
#: evaluation names written by older versions -> today's (``eval/success_rate`` became ``eval/success``)
LEGACY_NAMES = {"success_rate": "success"}
#: settings added after runs had been made: key -> (a key every run the setting applies to has, the value
#: runs made before the setting existed computed with); filled in where a run's config lacks the key
ADDED_SETTINGS: dict[str, tuple[str, Any]] = {
    # before it existed, the Q-network standardised unbounded inputs whenever it scaled inputs
    "learner.standardise_unbounded": ("learner.scale_inputs", True),
}
#: the scores a failed run loses from its failure step on (see the module docstring)
SCORES = ("success", "discounted_return")
#: the failure-score rule in one sentence, as the report states it
FAILURE_RULE = ("from its failure step on, a diverged or crashed run scores success 0 and, as discounted return, "
                "the lower of 0 and the worst return any run of the same task setting showed at that evaluation "
                "(min(0, worst observed)); failures are never dropped")
#: prefix of the config keys that describe the task (not hyperparameters: a different task setting is another problem)
TASK_PREFIX = "task."
#: the report file of a study or of one task setting (a folder holding one is not a run)
REPORT_MD = "report.md"
#: longest task-setting folder name kept readable as it is; longer names are cut and get a digest
MAX_SETTING_NAME = 100
#: task keys that size the learner (the learner's own keys carry their effect), not part of the task setting
LEARNER_SIZES_PREFIX = "task.learner_sizes."
#: arm of a run trained on the task's own reward with Q started at the potential (Wiewiora 2003)
START_AT_POTENTIAL_ARM = "none + Q started at Phi"
#: order of the known arms in tables and legends; other arms follow alphabetically
ARM_ORDER = ("none", START_AT_POTENTIAL_ARM, "potential", "potential_ahead", "progress")


def flatten(tree: dict[str, Any]) -> dict[str, Any]:
    """Nested config as dotted keys; lists become tuples so values can be compared and hashed."""
    return {key: _frozen(value) for key, value in flatten_config(tree).items()}


def _frozen(value: Any) -> Any:
    if isinstance(value, list | tuple):
        return tuple(_frozen(v) for v in value)
    if isinstance(value, dict):
        return tuple(sorted((k, _frozen(v)) for k, v in value.items()))
    return value


def arm_name(variant: str, start_at_potential: bool) -> str:
    """Label of a shaping arm: the variant, or the start-at-potential control arm."""
    return START_AT_POTENTIAL_ARM if variant == "none" and start_at_potential else variant


def arm_sort_key(arm: str) -> tuple[int, str]:
    """Known arms first, in :data:`ARM_ORDER`, then the rest by name."""
    return (ARM_ORDER.index(arm), "") if arm in ARM_ORDER else (len(ARM_ORDER), arm)


@dataclass
class Run:
    """One run folder as the report sees it."""

    name: str
    path: Path
    config: DictConfig
    status: str  # "finished", "diverged", "crashed" or "damaged"
    failure_step: int | None  # first environment step at which a failed run counts as failed
    final: dict[str, float]  # final evaluation (scores 0 for a failed run)
    evals: dict[str, tuple[np.ndarray, np.ndarray]] = field(repr=False)  # eval tag -> (steps, values)
    # (steps, discounted return) a failed run scores from its failure step on; None: 0 (see score_failures)
    failure_return: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)
    damage: str = ""  # what is wrong with a damaged run (names the file)
    flat: dict[str, Any] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.flat = flatten(OmegaConf.to_container(self.config, resolve=True))
        for key, (marker, earlier) in ADDED_SETTINGS.items():
            if marker in self.flat and key not in self.flat:
                self.flat[key] = earlier

    @property
    def failed(self) -> bool:
        return self.status != "finished"

    @property
    def seed(self) -> int:
        return int(self.flat["seed"])

    @property
    def learner(self) -> str:
        return str(self.flat["learner.kind"])

    @property
    def variant(self) -> str:
        return str(self.flat["shaping.variant"])

    @property
    def arm(self) -> str:
        return arm_name(self.variant, bool(self.flat.get("shaping.start_at_potential", False)))

    @property
    def budget(self) -> int:
        return int(self.flat["budget_steps"])

    @property
    def task_id(self) -> str:
        return str(self.flat["task.id"])

    def setting(self) -> dict[str, Any]:
        """Config keys that make up its hyperparameter setting (all but seed, shaping, task and execution keys)."""
        return {k: v for k, v in self.flat.items() if k != "seed" and not k.startswith(("shaping.", TASK_PREFIX))
                and not is_storage_key(k)}

    def task_setting(self) -> tuple[tuple[str, Any], ...]:
        """The ``task.*`` keys and values of its config, sorted by key (hashable)."""
        return tuple(sorted((k, v) for k, v in self.flat.items()
                            if k.startswith(TASK_PREFIX) and not k.startswith(LEARNER_SIZES_PREFIX)))


@dataclass
class Study:
    """The runs of one study folder, plus folders that could not be read as runs and duplicate runs."""

    path: Path
    runs: list[Run]
    unreadable: list[str]
    duplicates: list[tuple[str, str]] = field(default_factory=list)  # (folder left out, folder kept)

    @property
    def name(self) -> str:
        return self.path.name

    def learners(self) -> list[str]:
        return sorted({r.learner for r in self.runs})

    def arms(self) -> list[str]:
        return sorted({r.arm for r in self.runs}, key=arm_sort_key)

    def seeds(self) -> list[int]:
        return sorted({r.seed for r in self.runs})


def _status(path: Path) -> tuple[str, dict[str, Any] | None, str]:
    """Status, summary and (for a damaged run) what is wrong, naming the file."""
    summary_file = path / SUMMARY
    if not (path / MARKER).exists():
        return "crashed", None, ""
    try:
        summary = read_summary(path)
    except ValueError as err:
        return "damaged", None, str(err)
    expected = summary.get("metrics_sha256")
    if expected is not None and (not (path / METRICS).exists() or file_digest(path / METRICS) != expected):
        return "damaged", None, f"{path / METRICS}: not the table {summary_file.name} was written with"
    return ("diverged" if summary.get("status") == "diverged" else "finished"), summary, ""


def load_run(path: Path) -> Run:
    """Read one run folder; ``ValueError`` naming the file if its ``config.yaml`` is missing or unreadable.

    A failed run's discounted return is 0 here; :func:`score_failures` (called by
    :func:`load_study`) scores it against the runs of its task setting.
    """
    path = Path(path)
    config = load_config(path)
    status, summary, damage = _status(path)
    rows = read_metrics(path) if status != "damaged" else []
    by_tag: dict[str, list[tuple[int, float]]] = {}
    for step, tag, value in rows:
        if tag.startswith("eval/"):
            name = tag.removeprefix("eval/")
            by_tag.setdefault(LEGACY_NAMES.get(name, name), []).append((step, value))
    evals = {}
    for tag, pairs in by_tag.items():
        steps, values = np.array(pairs, dtype=np.float64).T
        evals[tag] = (steps.astype(np.int64), values)
    failure_step = None
    if status == "diverged":
        at = summary.get("diverged_at_step")
        failure_step = int(at) if at is not None else int(summary.get("steps", 0))
    elif status == "crashed":
        failure_step = max((s for s, _, _ in rows), default=-1) + 1
    elif status == "damaged":
        failure_step = 0
    final = {LEGACY_NAMES.get(k, k): v for k, v in summary["final"].items()} if status == "finished" else {}
    if status != "finished":
        final.update({tag: 0.0 for tag in SCORES})
    return Run(path.name, path, config, status, failure_step, final, evals,
               damage=damage.replace(f"{path.parent}{os.sep}", ""))


def drop_duplicates(runs: list[Run]) -> tuple[list[Run], list[tuple[str, str]]]:
    """One run per identity (:func:`qlab.runspec.run_digest`): a finished one first, then by folder name.

    The same run can sit in two folders (e.g. ``seed=0`` given once explicitly and once by
    default); it is counted once, and each folder left out is returned with the one kept.
    """
    digests = {id(r): run_digest(OmegaConf.to_container(r.config, resolve=True)) for r in runs}
    kept: dict[str, Run] = {}
    for run in sorted(runs, key=lambda r: (r.failed, r.name)):
        kept.setdefault(digests[id(run)], run)
    left_out = [(r.name, kept[digests[id(r)]].name) for r in runs if kept[digests[id(r)]] is not r]
    return [r for r in runs if kept[digests[id(r)]] is r], left_out


def _observed_returns(run: Run) -> tuple[np.ndarray, np.ndarray]:
    """(steps, discounted returns) the run recorded before its failure step (all of them if it finished)."""
    if "discounted_return" not in run.evals:
        return np.empty(0, dtype=np.int64), np.empty(0)
    steps, values = run.evals["discounted_return"]
    keep = np.isfinite(values) & (steps < (run.failure_step if run.failure_step is not None else np.inf))
    return steps[keep], values[keep]


def score_failures(runs: list[Run]) -> None:
    """Give each failed run of ``runs`` its discounted-return scores: ``min(0, worst observed)`` per evaluation step.

    The worst is taken over the runs of the same task setting, at each evaluation step (for the
    final score: over the final scores of the finished runs). Success stays 0.
    """
    groups: dict[tuple, list[Run]] = {}
    for run in runs:
        groups.setdefault(run.task_setting(), []).append(run)
    for group in groups.values():
        observed = [_observed_returns(r) for r in group]
        grid, at = np.unique(np.concatenate([s for s, _ in observed]), return_inverse=True)
        worst = np.zeros(grid.size)
        np.minimum.at(worst, at, np.concatenate([v for _, v in observed]))
        finals = [r.final["discounted_return"] for r in group if not r.failed]
        worst_final = float(min([0.0, *(v for v in finals if np.isfinite(v))]))
        for run in group:
            if run.failed:
                run.failure_return = (grid, worst)
                run.final.update(success=0.0, discounted_return=worst_final)


def load_study(folder: str | Path) -> Study:
    """Every run folder of a study, failures scored (folders starting with ``.`` and report folders skipped).

    A folder without a ``config.yaml`` but with a ``report.md`` is a report of one task setting
    (written by ``qlab-report``), not a run, and is skipped silently.
    """
    path = Path(folder)
    if not path.is_dir():
        raise ValueError(f"study folder {str(path)!r} does not exist or is not a folder")
    runs, unreadable = [], []
    for child in sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith(".")):
        if (child / "config.yaml").exists():
            try:
                runs.append(load_run(child))
            except ValueError:  # an unreadable config.yaml: listed, never fatal
                unreadable.append(child.name)
        elif not (child / REPORT_MD).exists():
            unreadable.append(child.name)
    runs, duplicates = drop_duplicates(runs)
    score_failures(runs)
    return Study(path, runs, unreadable, duplicates)


def eval_matrix(runs: list[Run], tag: str, steps: np.ndarray) -> np.ndarray:
    """Evaluation ``tag`` of each run at ``steps``, shape ``(n_runs, T)``.

    Each run's latest evaluation at or before a step is held until its next one. From a failed
    run's failure step on, success is 0, the discounted return is the failure score (the latest
    of ``run.failure_return`` at or before the step, 0 before its first or without one) and
    other tags NaN; before its first evaluation a run is NaN.
    """
    grid = np.asarray(steps, dtype=np.int64)
    out = np.full((len(runs), grid.size), np.nan)
    for i, run in enumerate(runs):
        if tag in run.evals:
            out[i] = _held(*run.evals[tag], grid, np.nan)
        if run.failure_step is not None:
            failed = grid >= run.failure_step
            if tag == "discounted_return" and run.failure_return is not None:
                out[i, failed] = _held(*run.failure_return, grid[failed], 0.0)
            else:
                out[i, failed] = 0.0 if tag in SCORES else np.nan
    return out


def _held(steps: np.ndarray, values: np.ndarray, grid: np.ndarray, before: float) -> np.ndarray:
    """``values`` recorded at sorted ``steps``, each held until the next, read at ``grid``; ``before`` earlier."""
    at = np.searchsorted(steps, grid, side="right") - 1
    return np.where(at >= 0, values[np.maximum(at, 0)], before) if steps.size else np.full(grid.size, before)


def eval_steps(runs: list[Run]) -> np.ndarray:
    """The evaluation steps of the finished runs (all runs if none finished), sorted and unique."""
    source = [r for r in runs if not r.failed] or runs
    steps = [r.evals["success"][0] for r in source if "success" in r.evals]
    if not steps:
        return np.array([0], dtype=np.int64)
    return np.unique(np.concatenate(steps))


def task_keys(runs: list[Run]) -> list[str]:
    """The ``task.*`` keys whose values differ between ``runs``, sorted."""
    settings = [dict(r.task_setting()) for r in runs]
    keys = sorted(set().union(*settings)) if settings else []
    return [k for k in keys if len({repr(s.get(k)) for s in settings}) > 1]


def position(value: Any) -> float | None:
    """Where a task value lies on a number line: a number itself, a list of numbers its midpoint; else None."""
    def number(v: Any) -> bool:
        return isinstance(v, int | float) and not isinstance(v, bool) and np.isfinite(v)

    if number(value):
        return float(value)
    if isinstance(value, tuple) and value and all(number(v) for v in value):
        return (min(value) + max(value)) / 2.0
    return None


def format_value(value: Any) -> str:
    """A config value as a person writes it: lists in brackets, ``None`` as ``absent``."""
    if value is None:
        return "absent"
    if isinstance(value, tuple):
        return "[" + ", ".join(format_value(v) for v in value) + "]"
    return str(value)


def _plain(value: Any) -> str:
    return "-".join(_plain(v) for v in value) if isinstance(value, tuple) else str(value)


def _digest(text: str, n: int = 10) -> str:
    return hashlib.sha256(text.encode()).hexdigest()[:n]


@dataclass
class TaskSetting:
    """One task setting of a study: the values of the task keys that differ in the study, and its runs."""

    values: dict[str, Any]  # differing task key -> value (None where absent)
    folder: str  # folder name of its report ("" when the study has one task setting)
    study: Study

    @property
    def label(self) -> str:
        """E.g. ``task.start_distance_m=[10.0, 20.0]`` (absent keys left out)."""
        return ", ".join(f"{k}={format_value(v)}" for k, v in self.values.items() if v is not None) or "defaults"

    @property
    def short_label(self) -> str:
        """The value alone when one key differs, else ``key=value`` pairs without the ``task.`` prefix."""
        if len(self.values) == 1:
            return format_value(next(iter(self.values.values())))
        return ", ".join(f"{k.removeprefix(TASK_PREFIX)}={format_value(v)}" for k, v in self.values.items()
                         if v is not None) or "defaults"


def setting_folder(values: dict[str, Any]) -> str:
    """Folder name of a task setting, e.g. ``task.start_distance_m=10.0-20.0``: file-name safe, at most
    :data:`MAX_SETTING_NAME` characters (a longer one is cut and ends in a digest of the whole)."""
    text = ",".join(f"{k}={_plain(v)}" for k, v in values.items() if v is not None)
    name = re.sub(r"[^A-Za-z0-9=,._+\-]", "_", text) or "task"
    if len(name) > MAX_SETTING_NAME:
        name = f"{name[: MAX_SETTING_NAME - 12]}..{_digest(repr(sorted(values.items())))}"
    return name


def _order(values: dict[str, Any]) -> tuple:
    """Sort key of a task setting: numbers (and list midpoints) by value, other values by their text."""
    return tuple((0, p, repr(v)) if (p := position(v)) is not None else (1, 0.0, repr(v)) for v in values.values())


def split_by_task(study: Study) -> list[TaskSetting]:
    """The study's runs partitioned by task setting, ordered by the differing keys' values.

    One setting (folder ``""``) when no ``task.*`` key differs. Folder names that would collide
    after sanitising get a digest of their values appended.
    """
    keys = task_keys(study.runs)
    groups: dict[str, tuple[dict[str, Any], list[Run]]] = {}
    for run in study.runs:
        values = {k: dict(run.task_setting()).get(k) for k in keys}
        groups.setdefault(repr(values), (values, []))[1].append(run)
    ordered = sorted(groups.values(), key=lambda g: _order(g[0]))
    folders = [setting_folder(values) if keys else "" for values, _ in ordered]
    clashes = {f for f in folders if folders.count(f) > 1}
    folders = [f"{f}..{_digest(repr(sorted(v.items())))}" if f in clashes else f
               for f, (v, _) in zip(folders, ordered, strict=True)]
    return [TaskSetting(values, folder, Study(study.path, runs, []))
            for folder, (values, runs) in zip(folders, ordered, strict=True)]
