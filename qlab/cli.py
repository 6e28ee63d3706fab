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

import os
import signal
import sys
from pathlib import Path

import hydra
from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode
from omegaconf import DictConfig

from qlab.config import CONFIG_DIR, override_problem, register_configs
from qlab.runfolder import RunFolderError
from qlab.runspec import run_name
from qlab.validation import require_name

register_configs()
#: pid of the process that runs ``qlab-run`` (launcher workers are other processes)
_LAUNCHER: list[int] = []
#: signals that stopped a run in this worker process (it then starts no further run)
_STOPPED: list[int] = []


@hydra.main(config_path=str(CONFIG_DIR), config_name="config", version_base="1.3")
def _app(cfg: DictConfig) -> dict:
    from qlab.experiment import RunStopped, run_experiment

    hc = HydraConfig.get()
    sweep = hc.mode == RunMode.MULTIRUN
    if _STOPPED:  # this worker was signalled during an earlier run of the sweep
        return {"status": "not started", "signal": _STOPPED[0]}
    try:
        series = require_name("series_name", cfg.series_name)
        run_dir = Path(cfg.results_dir) / series / run_name(list(hc.overrides.task))
        return run_experiment(cfg, run_dir, bar=not sweep)
    except RunStopped as stop:
        if not sweep:
            raise
        if os.getpid() == _LAUNCHER[0]:  # a serial sweep: stop launching the next runs
            raise KeyboardInterrupt from None
        _STOPPED.append(stop.signum)  # a worker process lives on, starts no further run, and the launcher ends
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
    _LAUNCHER[:] = [os.getpid()]
    received: list[int] = []

    def interrupt(signum: int, frame: object) -> None:  # recorded, then the usual KeyboardInterrupt
        received.append(signum)
        raise KeyboardInterrupt

    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, interrupt)
    try:
        _app()
    except KeyboardInterrupt:  # Ctrl-C while a sweep launcher waits for its workers
        received.append(received[0] if received else signal.SIGINT)
    if received:  # also when a launcher swallowed the KeyboardInterrupt
        print("qlab-run: interrupted; runs keep their last checkpoints: run the same command again to resume",
              file=sys.stderr)
        raise SystemExit(128 + received[0])
