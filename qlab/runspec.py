"""The run spec: which settings make a run what it is, and how a run is built and restored.

One module owns the three things the loop, the command line and the report must agree on:

* **identity**: :data:`STORAGE_KEYS` lists the settings that change only where or how a run is
  stored or shown. They are left out of the run's digest and of its folder name; every other
  setting (task, shaping, learner, seed, budget, evaluation, discount) changes the digest.
  ``torch_threads`` changes floating-point bits, not meaning: it is recorded with the run, a
  finished run is skipped whatever its value, and a resume with another value is refused.
* **building**: the task's copies in their shaping variant (training and evaluation) and the
  learner from a config, sizes checked before anything large is allocated.
* **restoring**: a run folder's final learner, from its ``config.yaml`` and checkpoint.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path
from typing import Any

import gymnasium as gym
from omegaconf import DictConfig, OmegaConf

from qlab.checkpoint import load_checkpoint
from qlab.config import DEFAULT_MAX_LEARNER_MIB, flatten, to_container
from qlab.copies import Copies, make_copies
from qlab.learners import LEARNERS, Learner, build_learner, load_target
from qlab.validation import require_name

#: settings (dotted keys, or a top-level key for all below it) that say where or how a run is
#: stored, shown or executed, not what it computes. ``study_name`` is the older name of ``series_name``.
STORAGE_KEYS = (
    "results_dir",
    "series_name",
    "study_name",
    "tensorboard",
    "checkpoint_every_episodes",
    "torch_threads",
    "learner.torch_threads",
    "max_learner_mib",
)
#: the one computing setting a finished run may be extended in (a larger budget resumes it)
BUDGET_KEY = "budget_steps"
#: override prefixes that choose how a sweep is launched or named, never part of a run's folder name
LAUNCH_KEYS = ("series", "hydra")
#: folder of a run's checkpoint inside its run folder
CHECKPOINT = "checkpoint"
#: longest run folder name kept as it is; longer names keep a readable head and end in a digest
MAX_NAME = 200


def is_storage_key(key: str) -> bool:
    """Whether the dotted config key ``key`` is a storage setting (see :data:`STORAGE_KEYS`)."""
    return any(key == k or key.startswith(f"{k}.") for k in STORAGE_KEYS)


def computing_settings(tree: dict[str, Any]) -> dict[str, Any]:
    """The settings of a resolved config tree that decide what a run computes, as dotted keys."""
    return {k: v for k, v in flatten(tree).items() if not is_storage_key(k)}


def run_digest(tree: dict[str, Any], with_budget: bool = True) -> str:
    """16 hex digits identifying what a run computes (without the budget: its lineage)."""
    settings = computing_settings(tree)
    if not with_budget:
        settings.pop(BUDGET_KEY, None)
    return hashlib.sha256(json.dumps(settings, sort_keys=True).encode()).hexdigest()[:16]


def run_name(overrides: list[str]) -> str:
    """Folder name of a run: its sorted command-line overrides, minus storage and launch settings."""
    kept = []
    for item in overrides:
        key = item.lstrip("+~").split("=")[0]
        if not is_storage_key(key) and key.split(".")[0] not in LAUNCH_KEYS and key.split("/")[0] not in LAUNCH_KEYS:
            kept.append(item.lstrip("+~"))
    name = re.sub(r"[^A-Za-z0-9=,._+\-]", "_", ",".join(sorted(kept)) or "defaults")
    if len(name) > MAX_NAME:  # file systems cap names at 255 bytes: keep a readable head, add a digest
        name = f"{name[: MAX_NAME - 17]}..{hashlib.sha256(name.encode()).hexdigest()[:15]}"
    return require_name("run name", name.lstrip(".") or "defaults")


# --- building -------------------------------------------------------------------------------


def make_task(task: DictConfig | dict[str, Any]) -> gym.Env:
    """The task from its config (``task.id`` plus its parameters), unshaped; ``ValueError`` on a bad setting."""
    params = dict(task) if isinstance(task, dict) else to_container(task)
    env_id = params.pop("id")
    params.pop("learner_sizes", None)
    params = params.pop("params", params)
    try:
        return gym.make(env_id, **params)
    except gym.error.Error as err:  # unknown id, wrong version, missing dependency
        known = sorted(k for k in gym.registry if not k.startswith("qlab/"))[:8]
        raise ValueError(f"id {env_id!r} is not a usable gymnasium id ({err}); e.g. {known}") from None
    except TypeError as err:  # a parameter the task does not take (e.g. +task.x=1)
        raise ValueError(str(err)) from None


def make_task_copies(cfg: DictConfig, n: int) -> Copies:
    """``n`` copies of the run's task in its shaping variant; errors prefixed with the config group."""
    try:
        make_task(cfg.task).close()  # a bad task setting is named as one, before shaping is tried
    except ValueError as err:
        raise ValueError(f"task ({cfg.task.id}): {err}") from None
    try:
        return make_copies(lambda: make_task(cfg.task), n, cfg.shaping.variant, float(cfg.gamma),
                           cfg.shaping.progress_scale)
    except ValueError as err:
        raise ValueError(f"shaping: {err}") from None


def _mib(n_bytes: int) -> str:
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20)):
        if n_bytes >= size:
            return f"{n_bytes / size:,.1f} {unit}"
    return f"{n_bytes / 2**20:.2f} MiB"


def check_learner_size(kind: str, settings: dict[str, Any], observation_space: gym.Space, action_space: gym.Space,
                       limit_mib: int) -> None:
    """Refuse, before allocation, a learner whose memory would exceed ``limit_mib``, naming the settings to lower."""
    cls, config_cls = (load_target(t) for t in LEARNERS[kind])
    estimate = getattr(cls, "memory_bytes", None)
    if estimate is None:
        return
    config = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(config_cls), settings))
    n_bytes, decided_by = estimate(config, observation_space, action_space)
    if n_bytes > limit_mib * 2**20:
        raise ValueError(
            f"this learner would need {_mib(n_bytes)} on this task ({decided_by}: "
            f"{', '.join(f'{k}={settings[k]}' for k in decided_by.split(', ') if k in settings)}), more than "
            f"max_learner_mib={limit_mib}; lower {decided_by} or raise max_learner_mib"
        )


def make_learner(cfg: DictConfig, observation_space: gym.Space, action_space: gym.Space, task: Any) -> Learner:
    """The run's learner for a task's spaces, sizes checked first; errors prefixed with ``learner (<kind>)``.

    ``task``: the bare task (its ``potential`` starts Q for ``shaping.start_at_potential``), or None.
    """
    settings = to_container(cfg.learner)
    kind = settings.pop("kind")
    try:
        check_learner_size(kind, settings, observation_space, action_space,
                           int(cfg.get("max_learner_mib", DEFAULT_MAX_LEARNER_MIB)))
        learner = build_learner(kind, settings, observation_space, action_space, int(cfg.seed))
    except ValueError as err:
        raise ValueError(f"learner ({kind}): {err}") from None
    if cfg.shaping.start_at_potential:
        start_at_potential(learner, kind, task)
    return learner


def start_at_potential(learner: Learner, kind: str, task: Any) -> None:
    """Set Q(s, a) = Phi(s) before learning (Wiewiora 2003), for learners and tasks that support it."""
    supported = sorted(k for k, (target, _) in LEARNERS.items() if hasattr(load_target(target), "initialise_from"))
    if not hasattr(learner, "initialise_from"):
        raise ValueError(f"shaping.start_at_potential needs a learner in {supported}, got learner {kind!r}")
    if not hasattr(task, "potential"):
        raise ValueError(f"shaping.start_at_potential needs a task with a potential, got {type(task).__name__}")
    learner.initialise_from(task.potential)


def build_run(cfg: DictConfig) -> tuple[Copies, Copies, Learner]:
    """Training copies, evaluation copies (one per start state) and the learner of a config.

    A bad setting raises ``ValueError`` naming it before any work.
    """
    import torch

    torch.set_num_threads(int(cfg.torch_threads))
    train = make_task_copies(cfg, int(cfg.copies))
    evaluation = make_task_copies(cfg, int(cfg.evaluation.episodes))
    learner = make_learner(cfg, train.observation_space, train.action_space, getattr(train, "task", None))
    return train, evaluation, learner


# --- restoring ------------------------------------------------------------------------------


def load_config(run_dir: Path) -> DictConfig:
    """A run folder's resolved ``config.yaml``; ``ValueError`` naming the file if it is missing or unreadable."""
    path = Path(run_dir) / "config.yaml"
    try:
        cfg = OmegaConf.load(path)
    except Exception as err:  # a missing, cut or hand-edited file
        raise ValueError(f"{path}: unreadable config ({type(err).__name__}: {str(err).splitlines()[0]})") from None
    if not isinstance(cfg, DictConfig) or "task" not in cfg or "learner" not in cfg:
        raise ValueError(f"{path}: not a qlab run config (no task or learner)")
    return cfg


def restore_learner(run_dir: Path, cfg: DictConfig | None = None) -> tuple[Learner, Any]:
    """A run's final learner (from its checkpoint) and its bare task; ``ValueError`` naming the file."""
    cfg = load_config(run_dir) if cfg is None else cfg
    try:
        task = make_task(cfg.task).unwrapped
    except ValueError as err:
        raise ValueError(f"task ({cfg.task.id}): {err}") from None
    learner = make_learner(cfg, task.observation_space, task.action_space, task)
    learner.load_state_dict(load_checkpoint(Path(run_dir) / CHECKPOINT)["learner"])
    return learner, task
