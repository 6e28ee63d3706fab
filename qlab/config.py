"""Structured configs (dataclasses) behind the hydra app, so a typo fails before any work.

Schemas are registered with hydra's ConfigStore as ``schema/<group>/<name>`` (kept out of the
choosable groups, so error messages list only real options); ``configs/<group>/<name>.yaml``
extends its schema. Task and learner schemas are derived from the
task constructors and the learners' own config dataclasses, so there is a single source of
truth for every setting.
"""

from __future__ import annotations

import dataclasses
import importlib
import inspect
import re
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf

from qlab.features import level_bins
from qlab.learners import LEARNERS, learner_config_class
from qlab.shaping import SHAPING_VARIANTS
from qlab.tasks import TASK_IDS, TASKS, LearnerSizes
from qlab.tasks.registry import make_task
from qlab.validation import require_name

#: default of ``max_learner_mib``; also the limit for runs recorded before the setting existed
DEFAULT_MAX_LEARNER_MIB = 2048

#: the yaml configs: qlab/configs/ in an installed wheel, else the top-level configs/ of the source tree
#: (an editable install or a checkout); pyproject.toml ships the latter as the former
_WHEEL_CONFIGS = Path(__file__).resolve().parent / "configs"
CONFIG_DIR = _WHEEL_CONFIGS if _WHEEL_CONFIGS.is_dir() else _WHEEL_CONFIGS.parent.parent / "configs"


@dataclass
class ShapingConfig:
    """Which shaping variant trains the learner; evaluation always uses the task's own reward."""

    variant: str = "none"
    progress_scale: Optional[float] = None  # noqa: UP045 (omegaconf needs typing.Optional)
    # Start Q at the task's potential Phi instead of shaping (Wiewiora 2003): the control arm for
    # ``potential``; tabular and linear learners only.
    start_at_potential: bool = False


@dataclass
class EvaluationConfig:
    """Greedy evaluation on the task's own reward from a fixed seeded set of start states."""

    every_steps: int = 5_000
    episodes: int = 20
    start_seed: int = 1_000_000  # start states use seeds start_seed .. start_seed + episodes - 1


@dataclass
class GymTaskConfig:
    """Any registered gymnasium id; ``params`` go to ``gymnasium.make``."""

    id: str = "CartPole-v1"
    params: dict[str, Any] = field(default_factory=dict)
    learner_sizes: LearnerSizes = field(default_factory=lambda: LearnerSizes([10], [8], 8))


@dataclass
class RunConfig:
    """One run: a task, a shaping variant and a learner, trained for a step budget."""

    task: Any = MISSING
    learner: Any = MISSING
    shaping: ShapingConfig = field(default_factory=ShapingConfig)
    evaluation: EvaluationConfig = field(default_factory=EvaluationConfig)
    seed: int = 0
    gamma: float = 0.99
    budget_steps: int = 50_000  # environment transitions of all copies together
    # copies of the task stepped as one batch, each running its own seeded episodes (1: the plain algorithm)
    copies: int = 16
    # a checkpoint (files synced to disk) costs some 5 ms: every 100 episodes keeps it to a few % of a Dock run
    checkpoint_every_episodes: int = 100
    series_name: str = "scratch"
    results_dir: str = "results"
    torch_threads: int = 1
    tensorboard: bool = True
    # A table, feature map or replay memory that would need more than this is refused before allocation.
    max_learner_mib: int = DEFAULT_MAX_LEARNER_MIB


def _field_type(annotation: Any) -> Any:
    """Map a constructor annotation to one omegaconf can check (anything else: ``Any``)."""
    if annotation in (int, float, str, bool):
        return annotation
    args = typing.get_args(annotation)
    if isinstance(annotation, types.UnionType | type(Optional[int])) and type(None) in args:  # noqa: UP045
        rest = [a for a in args if a is not type(None)]
        if len(rest) == 1 and rest[0] in (int, float, str, bool):
            return Optional[rest[0]]  # noqa: UP045
    return Any


def _plain(value: Any) -> Any:
    """Defaults as omegaconf-friendly values (tuples and arrays become lists)."""
    if hasattr(value, "tolist"):
        return value.tolist()
    if isinstance(value, tuple | list):
        return [_plain(v) for v in value]
    return value


def signature_schema(name: str, target: str, head: list[tuple[str, Any, Any]]) -> type:
    """A dataclass whose fields are ``head`` followed by the keyword arguments of ``target``."""
    module, attr = target.split(":")
    cls = getattr(importlib.import_module(module), attr)
    hints = typing.get_type_hints(cls.__init__)
    fields: list[tuple[str, Any, Any]] = list(head)
    for p in inspect.signature(cls.__init__).parameters.values():
        if p.name == "self" or p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            continue
        default = _plain(p.default) if p.default is not p.empty else MISSING
        kind = _field_type(hints.get(p.name, Any))
        spec = field(default_factory=lambda d=default: list(d)) if isinstance(default, list) else field(default=default)
        fields.append((p.name, kind, spec))
    return dataclasses.make_dataclass(name, fields)


def learner_schema(kind: str) -> type:
    """The learner's own config dataclass, headed by a ``kind`` field naming the learner."""
    base = learner_config_class(kind)
    hints = typing.get_type_hints(base)
    fields: list[tuple[str, Any, Any]] = [("kind", str, field(default=kind))]
    for f in dataclasses.fields(base):
        spec = field(default=f.default) if f.default_factory is dataclasses.MISSING else field(
            default_factory=f.default_factory
        )
        fields.append((f.name, hints[f.name], spec))
    return dataclasses.make_dataclass(f"{base.__name__}Node", fields)


def folder_name(value: Any) -> str:
    """``value`` made a harmless single folder name (hydra's own run and sweep folders use it, before any check)."""
    name = re.sub(r"[^A-Za-z0-9=,._+\-]", "_", str(value)).lstrip(".")
    return name or "_"


def task_level_bins(task: DictConfig, bins: list[int]) -> list[int]:
    """``bins`` with one cell per level on the observation dimensions a qlab task holds at discrete
    levels (its pending commands, :meth:`~qlab.tasks.base.ControlTask.observation_levels`); other
    gymnasium tasks keep ``bins``. The learner configs read their bins through it (``qlab_level_bins``)."""
    params = to_container(task)
    target = TASK_IDS.get(params.pop("id"))
    if target is None:
        return list(bins)
    params.pop("learner_sizes", None)
    return level_bins(list(bins), make_task(target, **params).observation_levels())


def register_configs() -> ConfigStore:
    """Register every schema with hydra's ConfigStore, and the ``qlab_folder`` and ``qlab_level_bins``
    resolvers (idempotent)."""
    if not OmegaConf.has_resolver("qlab_folder"):
        OmegaConf.register_new_resolver("qlab_folder", folder_name)
    if not OmegaConf.has_resolver("qlab_level_bins"):
        OmegaConf.register_new_resolver("qlab_level_bins", task_level_bins)
    cs = ConfigStore.instance()
    cs.store(name="schema_run", node=RunConfig)
    for option, entry in TASKS.items():
        head = [("id", str, field(default=entry.env_id)),
                ("learner_sizes", LearnerSizes, field(default_factory=lambda e=entry: dataclasses.replace(e.sizes)))]
        cs.store(group="task", name=option, node=signature_schema(f"{option}_task", entry.target, head))
    cs.store(group="task", name="gym", node=GymTaskConfig)
    for kind in LEARNERS:
        cs.store(group="schema/learner", name=kind, node=learner_schema(kind))
    return cs


def validate(cfg: DictConfig) -> None:
    """Checks a schema cannot express; a ``ValueError`` names the key and what is allowed."""
    positive = {
        "budget_steps": cfg.budget_steps,
        "evaluation.every_steps": cfg.evaluation.every_steps,
        "evaluation.episodes": cfg.evaluation.episodes,
        "checkpoint_every_episodes": cfg.checkpoint_every_episodes,
        "torch_threads": cfg.torch_threads,
        "max_learner_mib": cfg.max_learner_mib,
        "copies": cfg.copies,
    }
    for key, value in positive.items():
        if value <= 0:
            raise ValueError(f"{key} must be a positive integer, got {value}")
    if cfg.budget_steps % cfg.copies:
        below = cfg.budget_steps - cfg.budget_steps % cfg.copies
        raise ValueError(f"budget_steps={cfg.budget_steps} counts transitions of all copies together and must be a "
                         f"multiple of copies={cfg.copies}: use {below} or {below + cfg.copies}")
    for key, value in {"seed": cfg.seed, "evaluation.start_seed": cfg.evaluation.start_seed}.items():
        if value < 0:
            raise ValueError(f"{key} must be an integer >= 0, got {value}")
    if not 0.0 <= cfg.gamma <= 1.0:
        raise ValueError(f"gamma must lie in [0, 1], got {cfg.gamma}")
    scale = cfg.shaping.progress_scale
    if scale is not None and scale < 0:
        raise ValueError(f"shaping.progress_scale must be >= 0 (null: the task's default), got {scale}")
    if cfg.shaping.variant not in SHAPING_VARIANTS:
        raise ValueError(f"shaping.variant must be one of {list(SHAPING_VARIANTS)}, got {cfg.shaping.variant!r}")


def flatten(tree: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """A nested config as one level of dotted keys, e.g. ``learner.epsilon.start``."""
    out: dict[str, Any] = {}
    for key, value in tree.items():
        if isinstance(value, dict):
            out.update(flatten(value, f"{prefix}{key}."))
        else:
            out[f"{prefix}{key}"] = value
    return out


def to_container(cfg: DictConfig) -> dict[str, Any]:
    """Resolved plain-dict copy of a config."""
    return OmegaConf.to_container(cfg, resolve=True)  # type: ignore[return-value]


#: config groups a command line can choose options of (``learner=qnet``)
GROUPS = ("task", "shaping", "learner", "approach", "series")


def group_options(group: str) -> list[str]:
    """The options of a config group: its ``configs/<group>/*.yaml`` files and its registered schemas."""
    register_configs()
    files = {p.stem for p in (CONFIG_DIR / group).glob("*.yaml")}
    try:
        stored = {name.removesuffix(".yaml") for name in ConfigStore.instance().list(group)}
    except OSError:  # no schema registered as an option of this group
        stored = set()
    return sorted(files | stored)


def _chosen(override: Any, options: list[str]) -> list[str]:
    """The options an override of a group names (a sweep, ``glob(...)`` or one value)."""
    from hydra.core.override_parser.types import Glob

    value = override.value()
    if isinstance(value, Glob):
        return value.filter(options)
    if override.is_sweep_override():
        return list(override.sweep_string_iterator())
    return [str(value)]


def override_problem(argv: list[str]) -> str | None:
    """One line naming the first bad override of a command line (unknown key or group option), else None.

    Overrides are read by hydra's own parser, so its sweep syntax (``a,b``, ``range(...)``,
    ``choice(...)``, ``glob(...)``) is understood. A key is accepted if some chosen option of each
    group has it; ``+key`` and ``++key`` must name a key a schema has, or one inside a free-form
    node (``task.params``). Deletions (``~key``) and ``hydra`` settings are left to hydra.
    """
    from hydra import compose, initialize_config_dir
    from hydra._internal.utils import get_args_parser
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import HydraException

    try:
        parsed = OverridesParser.create().parse_overrides(get_args_parser().parse_args(argv).overrides)
    except HydraException as err:
        return f"cannot read the command line: {str(err).splitlines()[0]}"
    choices: dict[str, list[str]] = {}
    keys = []
    for o in parsed:
        name = o.key_or_group
        if o.is_delete() or name.startswith("hydra"):
            continue
        if name in GROUPS:
            options = group_options(name)
            chosen = _chosen(o, options)
            bad = [c for c in chosen if c not in options and c != "null"]
            if bad or not chosen:
                named = bad[0] if bad else o.input_line.split("=", 1)[-1]
                return f"{name}={named}: no such option; choose from {options}"
            choices[name] = [c for c in chosen if c != "null"]
        elif name == "series_name":  # checked before hydra makes its own folder under it
            values = list(o.sweep_string_iterator()) if o.is_sweep_override() else [o.value()]
            try:
                for value in values:
                    require_name("series_name", "" if value is None else str(value))
            except ValueError as err:
                return f"invalid setting: {err}"
        elif "/" not in name:
            keys.append(name)
    if not keys:
        return None
    first = [f"{g}={opts[0]}" for g, opts in choices.items() if opts]
    variants = [first] + [[f"{g}={o}" if f.startswith(f"{g}=") else f for f in first]
                          for g, opts in choices.items() for o in opts[1:]]
    register_configs()
    try:
        with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
            configs = [compose(config_name="config", overrides=v) for v in variants]
    except HydraException as err:
        return str(err).splitlines()[0]
    for key in keys:
        parent, _, leaf = key.rpartition(".")
        nodes = [cfg if not parent else OmegaConf.select(cfg, parent) for cfg in configs]
        nodes = [n for n in nodes if isinstance(n, DictConfig)]
        if any(OmegaConf.get_type(n) is dict for n in nodes):  # a free-form node: any key may be added
            continue
        if not any(leaf in n for n in nodes):
            valid = sorted({k for n in nodes for k in n})
            where = f"'{parent}'" if parent else "the run config"
            return f"unknown key '{key}': {where} has {valid}"
    return None
