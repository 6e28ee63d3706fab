"""Learners behind one protocol (:mod:`qlab.learners.protocol`), looked up by name.

Each entry maps a config-group name to ``module:LearnerClass`` and ``module:ConfigClass``;
every learner is built as ``LearnerClass(observation_space, action_space, config, seed)``.
"""

from __future__ import annotations

import importlib
from typing import Any

import gymnasium as gym

from qlab.learners.protocol import Learner, Transitions
from qlab.validation import require_choice

LEARNERS: dict[str, tuple[str, str]] = {
    "tabular": ("qlab.learners.tabular:TabularQ", "qlab.learners.tabular:TabularConfig"),
    "linear": ("qlab.learners.linear:LinearQ", "qlab.learners.linear:LinearConfig"),
    "lstdq": ("qlab.learners.lstdq:LSTDQ", "qlab.learners.lstdq:LSTDQConfig"),
    "qnet": ("qlab.learners.qnet:QNetLearner", "qlab.learners.qnet:QNetConfig"),
}


def load_target(target: str) -> Any:
    """The object named by ``module:attribute``."""
    module, attr = target.split(":")
    return getattr(importlib.import_module(module), attr)


def _entry(kind: str) -> tuple[str, str]:
    return LEARNERS[require_choice("learner", kind, sorted(LEARNERS))]


def learner_config_class(kind: str) -> type:
    """The config dataclass of learner ``kind``."""
    return load_target(_entry(kind)[1])


def build_learner(
    kind: str, settings: dict[str, Any], observation_space: gym.Space, action_space: gym.Space, seed: int
) -> Learner:
    """Construct learner ``kind`` from a plain dict of its config fields."""
    from omegaconf import OmegaConf
    from omegaconf.errors import OmegaConfBaseException

    cls, config_cls = (load_target(t) for t in _entry(kind))
    schema = OmegaConf.structured(config_cls)
    try:
        config = OmegaConf.to_object(OmegaConf.merge(schema, settings))
    except OmegaConfBaseException as err:  # e.g. a setting this version of the learner does not have
        raise ValueError(f"{str(err).splitlines()[0]}; valid settings: {sorted(schema)}") from None
    return cls(observation_space, action_space, config, seed)


__all__ = ["LEARNERS", "Learner", "Transitions", "build_learner", "learner_config_class", "load_target"]
