"""Console entry points.

``qlab-run``: the hydra app. One run, or a sweep with ``-m`` (``--multirun``)::

    qlab-run task=dock learner=qnet shaping=potential seed=3
    qlab-run -m series=demo                  # the demo study's sweep, 2 local workers

Runs land in ``<results_dir>/<series_name>/<run name>``, the run name made of the run's own
overrides (e.g. ``learner=qnet,seed=3,shaping=potential``), so re-running a sweep finds its
runs again: finished ones are skipped, interrupted ones resume from their checkpoint.
"""

from __future__ import annotations

import hashlib
import re
import sys
from pathlib import Path

import hydra
from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode
from omegaconf import DictConfig

from qlab.config import CONFIG_DIR, register_configs, unknown_key_message

MAX_NAME = 200
#: overrides that choose where a run is stored or how it is executed, not what it computes
NOT_IN_RUN_NAME = ("series", "series_name", "results_dir", "tensorboard", "torch_threads", "hydra")


def run_name(overrides: list[str]) -> str:
    """Folder name of a run: its sorted overrides, minus storage and execution settings."""
    kept = sorted(o.lstrip("+~") for o in overrides if o.lstrip("+~").split("=")[0].split(".")[0]
                  not in NOT_IN_RUN_NAME)
    name = re.sub(r"[^A-Za-z0-9=,._+\-]", "_", ",".join(kept) or "defaults")
    if len(name) > MAX_NAME:  # file systems cap names at 255 bytes: keep a readable head, add a digest
        name = f"{name[: MAX_NAME - 17]}..{hashlib.sha256(name.encode()).hexdigest()[:15]}"
    return name


register_configs()


@hydra.main(config_path=str(CONFIG_DIR), config_name="config", version_base="1.3")
def _app(cfg: DictConfig) -> dict:
    from qlab.experiment import run_experiment

    hc = HydraConfig.get()
    run_dir = Path(cfg.results_dir) / cfg.series_name / run_name(list(hc.overrides.task))
    try:
        return run_experiment(cfg, run_dir, bar=hc.mode != RunMode.MULTIRUN)
    except ValueError as err:  # a setting no schema could catch: report it plainly, no traceback
        raise SystemExit(f"qlab-run: invalid setting: {err}") from None


def run() -> None:
    """``qlab-run``: train (and sweep) from the shell; an unknown key fails at once, listing the valid ones."""
    problem = unknown_key_message(sys.argv[1:])
    if problem is not None:
        raise SystemExit(f"qlab-run: {problem}")
    _app()
