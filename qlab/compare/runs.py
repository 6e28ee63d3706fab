"""Load a study folder: every run's config, status, final numbers and evaluation curves.

A study folder holds one folder per run (names starting with ``.`` are skipped). A run is

* ``finished``: ``FINISHED`` marker present and ``summary.json`` status ``finished``;
* ``diverged``: marker present, summary status ``diverged`` (fails from ``diverged_at_step`` on);
* ``crashed``: no marker (killed or still running; fails after its last recorded step).

Diverged and crashed runs are failures: success 0 and discounted return 0 from their failure
step on, and 0 as final scores. They stay in every statistic; the report counts them.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from omegaconf import DictConfig, OmegaConf

from qlab.recording import MARKER, SUMMARY, read_metrics

#: the scores a failed run loses (set to 0 from its failure step on)
SCORES = ("success_rate", "discounted_return")
#: config keys that say where or how a run executes, not what it computes
EXECUTION_KEYS = ("study_name", "results_dir", "tensorboard", "torch_threads", "checkpoint_every_episodes")
#: arm of a run trained on the task's own reward with Q started at the potential (Wiewiora 2003)
START_AT_POTENTIAL_ARM = "none + Q started at Phi"
#: order of the known arms in tables and legends; other arms follow alphabetically
ARM_ORDER = ("none", START_AT_POTENTIAL_ARM, "potential", "progress")


def flatten(tree: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """Nested config as dotted keys; lists become tuples so values can be compared and hashed."""
    out: dict[str, Any] = {}
    for key, value in tree.items():
        if isinstance(value, dict):
            out.update(flatten(value, f"{prefix}{key}."))
        else:
            out[f"{prefix}{key}"] = _frozen(value)
    return out


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
    status: str  # "finished", "diverged" or "crashed"
    failure_step: int | None  # first environment step at which a failed run counts as failed
    final: dict[str, float]  # final evaluation (scores 0 for a failed run)
    evals: dict[str, tuple[np.ndarray, np.ndarray]] = field(repr=False)  # eval tag -> (steps, values)
    flat: dict[str, Any] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.flat = flatten(OmegaConf.to_container(self.config, resolve=True))

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
        """Config keys that make up its hyperparameter setting (all but seed, shaping and execution keys)."""
        return {k: v for k, v in self.flat.items()
                if k != "seed" and not k.startswith("shaping.") and k.split(".")[0] not in EXECUTION_KEYS}


@dataclass
class Study:
    """The runs of one study folder, plus folders that could not be read as runs."""

    path: Path
    runs: list[Run]
    unreadable: list[str]

    @property
    def name(self) -> str:
        return self.path.name

    def learners(self) -> list[str]:
        return sorted({r.learner for r in self.runs})

    def arms(self) -> list[str]:
        return sorted({r.arm for r in self.runs}, key=arm_sort_key)

    def seeds(self) -> list[int]:
        return sorted({r.seed for r in self.runs})


def _status(path: Path) -> tuple[str, dict[str, Any] | None]:
    summary_file = path / SUMMARY
    if not (path / MARKER).exists() or not summary_file.exists():
        return "crashed", None
    summary = json.loads(summary_file.read_text())
    return ("diverged" if summary.get("status") == "diverged" else "finished"), summary


def load_run(path: Path) -> Run:
    """Read one run folder; ``ValueError`` if it has no ``config.yaml``."""
    path = Path(path)
    if not (path / "config.yaml").exists():
        raise ValueError(f"run folder {str(path)!r} has no config.yaml")
    config = OmegaConf.load(path / "config.yaml")
    status, summary = _status(path)
    rows = read_metrics(path)
    by_tag: dict[str, list[tuple[int, float]]] = {}
    for step, tag, value in rows:
        if tag.startswith("eval/"):
            by_tag.setdefault(tag.removeprefix("eval/"), []).append((step, value))
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
    final = dict(summary["final"]) if status == "finished" else {}
    if status != "finished":
        final.update({tag: 0.0 for tag in SCORES})
    return Run(path.name, path, config, status, failure_step, final, evals)


def load_study(folder: str | Path) -> Study:
    """Every run folder of a study (folders whose names start with ``.`` are skipped)."""
    path = Path(folder)
    if not path.is_dir():
        raise ValueError(f"study folder {str(path)!r} does not exist or is not a folder")
    runs, unreadable = [], []
    for child in sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith(".")):
        if (child / "config.yaml").exists():
            runs.append(load_run(child))
        else:
            unreadable.append(child.name)
    return Study(path, runs, unreadable)


def eval_matrix(runs: list[Run], tag: str, steps: np.ndarray) -> np.ndarray:
    """Evaluation ``tag`` of each run at ``steps``, shape ``(n_runs, T)``.

    Each run's latest evaluation at or before a step is held until its next one. From a failed
    run's failure step on, scores (:data:`SCORES`) are 0 and other tags NaN; before its first
    evaluation a run is NaN.
    """
    grid = np.asarray(steps, dtype=np.int64)
    out = np.full((len(runs), grid.size), np.nan)
    for i, run in enumerate(runs):
        if tag in run.evals:
            s, v = run.evals[tag]
            at = np.searchsorted(s, grid, side="right") - 1
            out[i] = np.where(at >= 0, v[np.maximum(at, 0)], np.nan)
        if run.failure_step is not None:
            out[i, grid >= run.failure_step] = 0.0 if tag in SCORES else np.nan
    return out


def eval_steps(runs: list[Run]) -> np.ndarray:
    """The evaluation steps of the finished runs (all runs if none finished), sorted and unique."""
    source = [r for r in runs if not r.failed] or runs
    steps = [r.evals["success_rate"][0] for r in source if "success_rate" in r.evals]
    if not steps:
        return np.array([0], dtype=np.int64)
    return np.unique(np.concatenate(steps))
