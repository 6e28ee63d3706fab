"""One run: build task, shaping and learner from a config, train, evaluate, record, checkpoint.

The loop treats every learner alike (the protocol in :mod:`qlab.learners.protocol`). Training
episodes reset from seeds derived from the run seed and the episode index, and checkpoints are
taken at episode boundaries, so a resumed run repeats the uninterrupted run exactly.
"""

from __future__ import annotations

import dataclasses
import signal
import sys
import threading
import time
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np
from omegaconf import DictConfig, OmegaConf

from qlab import runfolder
from qlab.checkpoint import CheckpointError, has_checkpoint, load_checkpoint, save_checkpoint
from qlab.config import flatten, validate
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
from qlab.runspec import CHECKPOINT, build_run, config_tree, require_name, run_digest


@dataclass
class LoopState:
    """Position of the training loop, saved with every checkpoint."""

    step: int = 0
    episode: int = 0
    next_eval: int = 0
    last_eval: int = -1
    metric_rows: int = 0  # rows of metrics.csv committed with this checkpoint (checked on resume)
    torch_threads: int = 1  # a resume must use the same count to repeat the run exactly


def episode_seed(run_seed: int, episode: int) -> int:
    """Reset seed of a training episode: a function of the run seed and the episode index only."""
    return int(np.random.SeedSequence([run_seed, episode]).generate_state(1)[0])


def evaluate(learner: Learner, env: gym.Env, start_seeds: list[int], gamma: float) -> dict[str, float]:
    """Greedy episodes from fixed seeded start states, scored on the task's own reward.

    ``env`` is the training env (shaping included): the scores use ``info["base_reward"]``, and
    ``trained_discounted_return`` is the same episodes' return on the training reward, the number
    the learner's ``q_start`` (its predicted value of the start state) estimates.
    """
    success, disc, undisc, length, q_start, trained = [], [], [], [], [], []
    for s in start_seeds:
        obs, _ = env.reset(seed=s)
        q_start.append(float(learner.value(np.asarray(obs, dtype=np.float32)[None])[0]))
        done, t, g, g_trained, total, ok = False, 0, 0.0, 0.0, 0.0, False
        while not done:
            action = learner.greedy(np.asarray(obs, dtype=np.float32)[None])[0]
            obs, reward, terminated, truncated, info = env.step(action)
            base = float(info.get("base_reward", reward))
            g += gamma**t * base
            g_trained += gamma**t * float(reward)
            total += base
            ok = bool(info.get("success", False))
            t += 1
            done = terminated or truncated
        success.append(ok)
        disc.append(g)
        trained.append(g_trained)
        undisc.append(total)
        length.append(t)
    return {
        "success_rate": float(np.mean(success)),
        "discounted_return": float(np.mean(disc)),
        "return": float(np.mean(undisc)),
        "length": float(np.mean(length)),
        "q_start": float(np.mean(q_start)),
        "trained_discounted_return": float(np.mean(trained)),
    }


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
    env, eval_env, learner = build_run(cfg)
    run_dir = Path(run_dir)
    run_dir.parent.mkdir(parents=True, exist_ok=True)
    with runfolder.locked(run_dir), StopFlag() as stop:
        return _run_locked(cfg, run_dir, env, eval_env, learner, bar, on_checkpoint, stop)


def _run_locked(cfg: DictConfig, run_dir: Path, env: gym.Env, eval_env: gym.Env, learner: Learner, bar: bool,
                on_checkpoint: Callable[[int], None] | None, stop: StopFlag) -> dict:
    tree = config_tree(cfg)
    budget, gamma = int(cfg.budget_steps), float(cfg.gamma)  # plain numbers: config lookups are slow in the loop
    saved, note = _saved_state(run_dir)
    plan = runfolder.plan(run_dir, tree, budget, None if saved is None else int(saved["loop"]["step"]))
    notes = [n for n in (note, plan.note) if n]
    if plan.action == "skip":
        Progress(run_dir.name, 1, False).close(f"already finished ({plan.summary.get('status')}), skipped")
        return plan.summary
    if plan.action == "new":
        saved = None
    loop = LoopState()
    if saved is not None:
        threads = int(saved["loop"].get("torch_threads", cfg.torch_threads))
        if threads != int(cfg.torch_threads):
            raise runfolder.RunFolderError(
                f"run {run_dir} was started with torch_threads={threads}; resuming with "
                f"torch_threads={cfg.torch_threads} would not repeat it exactly: use torch_threads={threads}")
        loop = LoopState(**saved["loop"])
        recorded = [r for r in read_metrics(run_dir) if r[0] <= loop.step] if (run_dir / METRICS).exists() else []
        if len(recorded) != loop.metric_rows:
            moved = runfolder.set_aside(run_dir, "damaged")
            notes.append(f"{run_dir / METRICS} holds {len(recorded)} rows up to step {loop.step:,} but its checkpoint "
                         f"recorded {loop.metric_rows}; the damaged run was moved to {moved} and starts again")
            loop, saved = LoopState(), None
        else:
            learner.load_state_dict(saved["learner"])
    for line in notes:
        print(f"{run_dir.name}: {line}", file=sys.stderr)
    run_dir.mkdir(parents=True, exist_ok=True)
    digest = run_digest(tree)
    config_yaml = OmegaConf.to_yaml(cfg, resolve=True)
    atomic_write_text(run_dir / "config.yaml", config_yaml)
    atomic_write_text(run_dir / runfolder.OWNER, digest + "\n")
    start_seeds = [cfg.evaluation.start_seed + i for i in range(cfg.evaluation.episodes)]
    loop.torch_threads = int(cfg.torch_threads)

    recorder = Recorder(run_dir, resume_step=loop.step, tensorboard=cfg.tensorboard)
    progress = Progress(run_dir.name, budget, bar)
    if loop.step == 0:
        recorder.text("config", config_yaml)
    checkpoints = 0
    status, diverged_at = "finished", None

    def checkpoint() -> None:
        nonlocal checkpoints
        recorder.commit()
        loop.metric_rows = len(recorder.rows)
        save_checkpoint(run_dir / CHECKPOINT, {"learner": learner.state_dict(), "loop": dataclasses.asdict(loop)})
        checkpoints += 1
        if on_checkpoint is not None:
            on_checkpoint(checkpoints)

    def halt() -> None:
        """Stop at a signal: keep the last checkpoint, one line, exit 128 + signal."""
        recorder.close()
        name = signal.Signals(stop.signum).name
        progress.close(f"stopped by {name} at step {loop.step:,}; the last checkpoint is kept: "
                       "run the same command again to resume")
        raise RunStopped(stop.signum)

    latest = {"success_rate": float("nan")}

    def run_eval() -> dict[str, float]:
        result = evaluate(learner, eval_env, start_seeds, gamma)
        latest.update(result)
        recorder.scalars(result, loop.step, "eval/")
        loop.last_eval = loop.step
        loop.next_eval = loop.step + cfg.evaluation.every_steps
        return result

    if loop.step == 0 and loop.last_eval < 0:
        run_eval()
    while loop.step < budget and status == "finished":
        obs, _ = env.reset(seed=episode_seed(cfg.seed, loop.episode))
        tick = time.perf_counter()
        learned: dict[str, list[float]] = defaultdict(list)
        t, train_return, base_return, complete, ok = 0, 0.0, 0.0, False, False
        while loop.step < budget:
            if stop.signum is not None:
                halt()
            action = learner.act(np.asarray(obs, dtype=np.float32)[None])[0]
            next_obs, reward, terminated, truncated, info = env.step(action)
            metrics = learner.learn(Transitions.single(obs, action, reward, next_obs, terminated, truncated))
            loop.step += 1
            train_return += gamma**t * float(reward)
            base_return += gamma**t * float(info.get("base_reward", reward))
            ok = bool(info.get("success", False))
            t += 1
            for name, value in metrics.items():
                learned[name].append(float(value))
            if metrics.get("nonfinite") or not all(np.isfinite(v) for v in metrics.values()):
                status, diverged_at = "diverged", loop.step
                break
            if loop.step >= loop.next_eval:
                run_eval()
            obs = next_obs
            if terminated or truncated:
                complete = True
                break
        if status == "finished" and not np.isfinite(learner.value(np.asarray(obs, dtype=np.float32)[None])[0]):
            status, diverged_at = "diverged", loop.step
        if complete:
            recorder.scalars(
                {"discounted_return": train_return, "base_discounted_return": base_return,
                 "length": t, "success": float(ok)},
                loop.step, "episode/",
            )
            recorder.scalars({k: float(np.mean(v)) for k, v in learned.items() if k != "nonfinite"},
                             loop.step, "learn/")
            recorder.scalar("speed/steps_per_second", t / max(time.perf_counter() - tick, 1e-9), loop.step)
            loop.episode += 1
            progress.update(loop.step, f"episode {loop.episode}, evaluated success {latest['success_rate']:.2f}")
            if loop.episode % cfg.checkpoint_every_episodes == 0:
                checkpoint()
    if stop.signum is not None:
        halt()
    final = run_eval() if loop.last_eval != loop.step else _last_eval(recorder, loop.step)
    checkpoint()
    summary = {"status": status, "steps": loop.step, "episodes": loop.episode, "diverged_at_step": diverged_at,
               "config_hash": digest, "final": final, "metric_rows": len(recorder.rows),
               "metrics_sha256": file_digest(run_dir / METRICS)}
    recorder.hparams(flatten(tree), final)
    recorder.close()
    atomic_write_json(run_dir / SUMMARY, summary)
    atomic_write_text(run_dir / MARKER, digest + "\n")
    done = f"diverged at step {diverged_at}" if status == "diverged" else (
        f"success {final['success_rate']:.2f}, discounted return {final['discounted_return']:.3f}")
    progress.close(done)
    return summary


def _last_eval(recorder: Recorder, step: int) -> dict[str, float]:
    """The evaluation already recorded at ``step`` (when the budget ended on an evaluation)."""
    return {tag.removeprefix("eval/"): v for s, tag, v in recorder.rows if s == step and tag.startswith("eval/")}
