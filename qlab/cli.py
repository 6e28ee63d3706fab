"""Console entry points.

``qlab-run``: the hydra app. One run, or a sweep with ``-m`` (``--multirun``)::

    qlab-run task=dock learner=qnet shaping=potential seed=3
    qlab-run -m series=demo                 # the demo series' sweep, 2 local workers

Runs land in ``<results_dir>/<series_name>/<run name>``, the run name made of the run's own
overrides minus storage settings (e.g. ``learner=qnet,seed=3,shaping=potential``), so re-running
a sweep finds its runs again (:mod:`qlab.runfolder` states what happens to each folder).

Every mistake ends in one line naming the key, value or file, never a traceback. In a sweep a
run that cannot start (a damaged or foreign folder, a refused resume) is reported and the sweep
goes on; Ctrl-C (SIGINT) or SIGTERM stops the runs at their next step, keeping their last
checkpoints, and exits 130 / 143.
"""

from __future__ import annotations

import signal
import sys
from pathlib import Path

import hydra
from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode
from omegaconf import DictConfig

from qlab.config import CONFIG_DIR, override_problem, register_configs
from qlab.runfolder import RunFolderError
from qlab.runspec import require_name, run_name

register_configs()


@hydra.main(config_path=str(CONFIG_DIR), config_name="config", version_base="1.3")
def _app(cfg: DictConfig) -> dict:
    from qlab.experiment import RunStopped, run_experiment

    hc = HydraConfig.get()
    sweep = hc.mode == RunMode.MULTIRUN
    try:
        series = require_name("series_name", cfg.series_name)
        run_dir = Path(cfg.results_dir) / series / run_name(list(hc.overrides.task))
        return run_experiment(cfg, run_dir, bar=not sweep)
    except RunStopped as stop:  # in a sweep the worker lives on; the launcher's own Ctrl-C ends the command
        if not sweep:
            raise
        return {"status": "stopped", "signal": stop.signum}
    except ValueError as err:  # a setting no schema could catch, or a folder that may not be written
        message = str(err) if isinstance(err, RunFolderError) else f"invalid setting: {err}"
        if not sweep:
            raise SystemExit(f"qlab-run: {message}") from None
        print(f"qlab-run: run not started: {message}", file=sys.stderr)
        return {"status": "refused", "error": message}


def run() -> None:
    """``qlab-run``: train (and sweep) from the shell; a bad key or option fails at once, naming the valid ones."""
    problem = override_problem(sys.argv[1:])
    if problem is not None:
        raise SystemExit(f"qlab-run: {problem}")
    try:
        _app()
    except KeyboardInterrupt:  # Ctrl-C while a sweep launcher waits for its workers
        print("qlab-run: interrupted; runs keep their last checkpoints: run the same command again to resume",
              file=sys.stderr)
        raise SystemExit(128 + signal.SIGINT) from None
