"""One run: build the task's copies and the learner from a config, train, evaluate, record, checkpoint.

Training steps ``copies`` copies of the task as one batch (:mod:`qlab.copies`); each copy runs
its own episodes, each episode reset from a seed derived from the run seed and the episode's
index (episodes are numbered in the order they start, copies in index order), and no transition
crosses an episode boundary. The budget counts environment transitions of all copies together;
a run ends at the first batch that reaches it. The loop treats every learner alike (the protocol
in :mod:`qlab.learners.protocol`): one ``act`` call and one ``learn`` call per batch step.

Checkpoints hold the learner, the loop's counters, every copy's state and random stream and the
running returns of unfinished episodes, so a run killed at any checkpoint and resumed repeats
the uninterrupted run exactly (for qlab's tasks; a foreign gymnasium task's copies cannot be
saved, so its unfinished episodes start again on resume).
"""

from __future__ import annotations

import dataclasses
import math
import signal
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from omegaconf import DictConfig, OmegaConf

from qlab import runfolder
from qlab.checkpoint import CheckpointError, has_checkpoint, load_checkpoint, save_checkpoint
from qlab.config import flatten, to_container, validate
from qlab.copies import Copies
from qlab.evaluation import evaluate
from qlab.learners import Learner, Transitions
from qlab.progress import Progress
from qlab.recording import (
    MARKER,
    METRICS,
    SUMMARY,
    Recorder,
    atomic_write_json,
    atomic_write_text,
    file_digest,
    read_metrics,
)
from qlab.runspec import CHECKPOINT, build_run, run_digest
from qlab.validation import require_name


@dataclass
class LoopState:
    """Position of the training loop, saved with every checkpoint."""

    step: int = 0  # environment transitions so far, all copies together
    started: int = 0  # episodes started (the next episode's index)
    finished: int = 0  # episodes ended (terminated or truncated)
    next_eval: int = 0
    last_eval: int = -1
    next_checkpoint: int = 0  # checkpoint once this many episodes have ended
    metric_rows: int = 0  # rows of metrics.csv committed with this checkpoint (checked on resume)
    torch_threads: int = 1  # a resume must use the same count to repeat the run exactly


def episode_seed(run_seed: int, episode: int) -> int:
    """Reset seed of a training episode: a function of the run seed and the episode index only."""
    return int(np.random.SeedSequence([run_seed, episode]).generate_state(1)[0])


class EpisodeTally:
    """Running discounted returns and lengths of every copy's current episode (vectorised over copies)."""

    def __init__(self, n: int, gamma: float):
        self.gamma = gamma
        self.length = np.zeros(n, dtype=np.int64)
        self.trained = np.zeros(n)  # discounted return on the training reward
        self.base = np.zeros(n)  # discounted return on the task's own reward

    def restart(self, which: np.ndarray) -> None:
        """Zero the tallies of the copies starting a new episode."""
        self.length[which], self.trained[which], self.base[which] = 0, 0.0, 0.0

    def add(self, reward: np.ndarray, base_reward: np.ndarray) -> None:
        """Add one step's rewards of every copy, discounted by ``gamma ** t`` of its own episode."""
        discount = self.gamma ** self.length
        self.trained += discount * reward
        self.base += discount * base_reward
        self.length += 1

    def state_dict(self) -> dict[str, np.ndarray]:
        return {"length": self.length.copy(), "trained": self.trained.copy(), "base": self.base.copy()}

    def load_state_dict(self, state: dict[str, np.ndarray]) -> None:
        self.length[:], self.trained[:], self.base[:] = state["length"], state["trained"], state["base"]


class MetricMeans:
    """Means of the learner's metrics since they were last recorded, at each evaluation (checkpointable)."""

    def __init__(self) -> None:
        self.sums: dict[str, float] = {}
        self.counts: dict[str, int] = {}

    def add(self, metrics: dict[str, float]) -> None:
        for name, value in metrics.items():
            if name != "nonfinite":
                self.sums[name] = self.sums.get(name, 0.0) + float(value)
                self.counts[name] = self.counts.get(name, 0) + 1

    def take(self) -> dict[str, float]:
        """The means, then start afresh."""
        means = {k: self.sums[k] / self.counts[k] for k in self.sums}
        self.sums, self.counts = {}, {}
        return means

    def state_dict(self) -> dict[str, Any]:
        return {"sums": dict(self.sums), "counts": dict(self.counts)}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self.sums, self.counts = dict(state["sums"]), {k: int(v) for k, v in state["counts"].items()}


class RunStopped(SystemExit):
    """A run stopped by SIGINT or SIGTERM: exits 128 + the signal number, no traceback."""

    def __init__(self, signum: int):
        super().__init__(128 + signum)
        self.signum = signum


class StopFlag:
    """SIGINT and SIGTERM set a flag the loop checks at every step (handlers restored on exit)."""

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self) -> None:
        self.signum: int | None = None
        self._previous: dict[int, Any] = {}

    def __enter__(self) -> StopFlag:
        if threading.current_thread() is threading.main_thread():
            for sig in self.SIGNALS:
                self._previous[sig] = signal.signal(sig, self._set)
        return self

    def _set(self, signum: int, frame: Any) -> None:
        self.signum = signum

    def __exit__(self, *exc: object) -> None:
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)


def _saved_state(run_dir: Path) -> tuple[dict[str, Any] | None, str]:
    """The checkpoint of a run folder qlab made, if readable; a damaged one is moved aside with a note."""
    if not (run_dir / runfolder.OWNER).is_file() or not has_checkpoint(run_dir / CHECKPOINT):
        return None, ""
    try:
        return load_checkpoint(run_dir / CHECKPOINT), ""
    except CheckpointError as err:
        moved = runfolder.set_aside(run_dir, "damaged")
        return None, f"{err}; the damaged run was moved to {moved} and starts again"


def run_experiment(
    cfg: DictConfig, run_dir: Path, bar: bool = True, on_checkpoint: Callable[[int], None] | None = None
) -> dict:
    """Train and evaluate one configuration in ``run_dir``; resume, extend or skip as the folder allows.

    ``on_checkpoint(n)`` is called after the n-th checkpoint of this call is on disk (the tests
    use it to signal the process at a chosen checkpoint). A bad setting or a folder that may not
    be written raises ``ValueError`` with one line naming it; SIGINT/SIGTERM raise
    :class:`RunStopped` after keeping the last checkpoint.
    """
    validate(cfg)
    require_name("series_name", cfg.series_name)
    copies, eval_copies, learner = build_run(cfg)
    run_dir = Path(run_dir)
    run_dir.parent.mkdir(parents=True, exist_ok=True)
    with runfolder.locked(run_dir), StopFlag() as stop:
        return _Run(cfg, run_dir, copies, eval_copies, learner, bar, on_checkpoint, stop).execute()


class _Run:
    """One run inside its locked folder: prepare the folder, train, finish."""

    def __init__(self, cfg: DictConfig, run_dir: Path, copies: Copies, eval_copies: Copies, learner: Learner,
                 bar: bool, on_checkpoint: Callable[[int], None] | None, stop: StopFlag):
        self.cfg, self.run_dir, self.copies, self.eval_copies, self.learner = cfg, run_dir, copies, eval_copies, learner
        self.bar, self.on_checkpoint, self.stop = bar, on_checkpoint, stop
        self.budget, self.gamma = int(cfg.budget_steps), float(cfg.gamma)  # plain numbers: config lookups are slow
        self.seed, self.every_eval = int(cfg.seed), int(cfg.evaluation.every_steps)
        self.every_checkpoint = int(cfg.checkpoint_every_episodes)
        self.start_seeds = [int(cfg.evaluation.start_seed) + i for i in range(int(cfg.evaluation.episodes))]
        self.loop = LoopState(torch_threads=int(cfg.torch_threads), next_checkpoint=self.every_checkpoint)
        self.tally = EpisodeTally(copies.n, self.gamma)
        self.learned = MetricMeans()
        self.checkpoints = 0
        self.latest_success = float("nan")

    # --- folder ---------------------------------------------------------------------------

    def _restore(self, saved: dict[str, Any], notes: list[str]) -> None:
        """Load a checkpoint; if the metrics table does not match it, move the folder aside and add a note."""
        cfg, run_dir = self.cfg, self.run_dir
        threads = int(saved["loop"].get("torch_threads", cfg.torch_threads))
        if threads != int(cfg.torch_threads):
            raise runfolder.RunFolderError(
                f"run {run_dir} was started with torch_threads={threads}; resuming with "
                f"torch_threads={cfg.torch_threads} would not repeat it exactly: use torch_threads={threads}")
        loop = LoopState(**saved["loop"])
        recorded = read_metrics(run_dir, up_to_step=loop.step)
        if len(recorded) != loop.metric_rows:
            moved = runfolder.set_aside(run_dir, "damaged")
            notes.append(f"{run_dir / METRICS} holds {len(recorded)} rows up to step {loop.step:,} but its checkpoint "
                         f"recorded {loop.metric_rows}; the damaged run was moved to {moved} and starts again")
            return
        self.loop = loop
        self.learner.load_state_dict(saved["learner"])
        self.learned.load_state_dict(saved["learned"])
        if self.copies.savable and "copies" in saved:
            self.copies.load_state_dict(saved["copies"])
            self.tally.load_state_dict(saved["episodes"])
        else:
            notes.append(f"resumed at step {loop.step:,}; this task's copies cannot be saved, so their unfinished "
                         "episodes start again")

    def execute(self) -> dict:
        """Skip, resume or start the run; train to the budget; write the summary and the finish marker."""
        cfg, run_dir = self.cfg, self.run_dir
        tree = to_container(cfg)
        saved, note = _saved_state(run_dir)
        plan = runfolder.plan(run_dir, tree, self.budget, None if saved is None else int(saved["loop"]["step"]))
        notes = [n for n in (note, plan.note) if n]
        if plan.action == "skip":
            Progress(run_dir.name, 1, False).close(f"already finished ({plan.summary.get('status')}), skipped")
            return plan.summary
        if plan.action == "resume" and saved is not None:
            self._restore(saved, notes)
        for line in notes:
            print(f"{run_dir.name}: {line}", file=sys.stderr)
        run_dir.mkdir(parents=True, exist_ok=True)
        self.digest = run_digest(tree)
        config_yaml = OmegaConf.to_yaml(cfg, resolve=True)
        atomic_write_text(run_dir / "config.yaml", config_yaml)
        atomic_write_text(run_dir / runfolder.OWNER, self.digest + "\n")
        self.loop.torch_threads = int(cfg.torch_threads)
        self.recorder = Recorder(run_dir, resume_step=self.loop.step, tensorboard=cfg.tensorboard)
        self.progress = Progress(run_dir.name, self.budget, self.bar)
        if self.loop.step == 0:
            self.recorder.text("config", config_yaml)
        status, diverged_at = self._train()
        return self._finish(tree, status, diverged_at)

    # --- training -------------------------------------------------------------------------

    def _train(self) -> tuple[str, int | None]:
        """Step every copy until the budget; ``("diverged", step)`` when the learner's numbers stop being finite."""
        loop, copies, learner, tally = self.loop, self.copies, self.learner, self.tally
        if loop.step == 0 and loop.last_eval < 0:
            self._evaluate()
        obs = None if copies.done.all() else copies.observe()
        tick, ticked_at = time.perf_counter(), loop.step
        while loop.step < self.budget:
            if self.stop.signum is not None:
                self._halt()
            if copies.done.any():
                starting = copies.done.copy()
                k = int(starting.sum())
                seeds = [episode_seed(self.seed, loop.started + i) for i in range(k)]
                loop.started += k
                obs = copies.reset(starting, seeds)
                tally.restart(starting)
            step = copies.step(learner.act(obs))
            metrics = learner.learn(Transitions(step.obs, step.action, step.reward, step.next_obs,
                                                step.terminated, step.truncated))
            loop.step += copies.n
            tally.add(step.reward, step.base_reward)
            self.learned.add(metrics)
            if metrics and (metrics.get("nonfinite") or not math.isfinite(sum(metrics.values()))):  # inf or nan
                return "diverged", loop.step
            if loop.step >= loop.next_eval:
                now = time.perf_counter()
                self.recorder.scalars(self.learned.take(), loop.step, "learn/")
                self.recorder.scalar("speed/steps_per_second", (loop.step - ticked_at) / max(now - tick, 1e-9),
                                     loop.step)
                self._evaluate()
                tick, ticked_at = time.perf_counter(), loop.step
            ended = step.terminated | step.truncated
            if ended.any():
                self._record_episodes(ended, step.success)
                if loop.finished >= loop.next_checkpoint:
                    self._checkpoint()
                    loop.next_checkpoint = (loop.finished // self.every_checkpoint + 1) * self.every_checkpoint
            obs = step.next_obs
        return "finished", None

    def _record_episodes(self, ended: np.ndarray, success: np.ndarray) -> None:
        """Episode scalars of the copies that ended on this step: means, and how many ended."""
        loop, tally, recorder = self.loop, self.tally, self.recorder
        loop.finished += int(ended.sum())
        recorder.scalars({"discounted_return": float(tally.trained[ended].mean()),
                          "base_discounted_return": float(tally.base[ended].mean()),
                          "length": float(tally.length[ended].mean()), "success": float(success[ended].mean()),
                          "count": float(ended.sum())}, loop.step, "episode/")
        self.progress.update(loop.step, f"episode {loop.finished}, evaluated success {self.latest_success:.2f}")

    def _evaluate(self) -> dict[str, float]:
        result = evaluate(self.learner, self.eval_copies, self.start_seeds, self.gamma)
        self.latest_success = result["success"]
        self.recorder.scalars(result, self.loop.step, "eval/")
        self.loop.last_eval = self.loop.step
        self.loop.next_eval = (self.loop.step // self.every_eval + 1) * self.every_eval  # on a fixed grid
        return result

    def _checkpoint(self) -> None:
        self.recorder.commit()
        self.loop.metric_rows = len(self.recorder.rows)
        tree = {"learner": self.learner.state_dict(), "loop": dataclasses.asdict(self.loop),
                "learned": self.learned.state_dict(), "episodes": self.tally.state_dict()}
        if self.copies.savable:
            tree["copies"] = self.copies.state_dict()
        save_checkpoint(self.run_dir / CHECKPOINT, tree)
        self.checkpoints += 1
        if self.on_checkpoint is not None:
            self.on_checkpoint(self.checkpoints)

    def _halt(self) -> None:
        """Stop at a signal: keep the last checkpoint, one line, exit 128 + signal."""
        self.recorder.close()
        name = signal.Signals(self.stop.signum).name
        self.progress.close(f"stopped by {name} at step {self.loop.step:,}; the last checkpoint is kept: "
                            "run the same command again to resume")
        raise RunStopped(self.stop.signum)

    # --- the end --------------------------------------------------------------------------

    def _finish(self, tree: dict[str, Any], status: str, diverged_at: int | None) -> dict:
        loop, recorder, run_dir = self.loop, self.recorder, self.run_dir
        if self.stop.signum is not None:
            self._halt()
        final = self._evaluate() if loop.last_eval != loop.step else _last_eval(recorder, loop.step)
        self._checkpoint()
        summary = {"status": status, "steps": loop.step, "episodes": loop.finished, "diverged_at_step": diverged_at,
                   "config_hash": self.digest, "final": final, "metric_rows": len(recorder.rows),
                   "metrics_sha256": file_digest(run_dir / METRICS)}
        recorder.hparams(flatten(tree), final)
        recorder.close()
        atomic_write_json(run_dir / SUMMARY, summary)
        atomic_write_text(run_dir / MARKER, self.digest + "\n")
        done = f"diverged at step {diverged_at}" if status == "diverged" else (
            f"success {final['success']:.2f}, discounted return {final['discounted_return']:.3f}")
        self.progress.close(done)
        return summary


def _last_eval(recorder: Recorder, step: int) -> dict[str, float]:
    """The evaluation already recorded at ``step`` (when the budget ended on an evaluation)."""
    return {tag.removeprefix("eval/"): v for s, tag, v in recorder.rows if s == step and tag.startswith("eval/")}
