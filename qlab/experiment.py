"""One run: build task, shaping and learner from a config, train, evaluate, record, checkpoint.

The loop treats every learner alike (the protocol in :mod:`qlab.learners.protocol`). Training
episodes reset from seeds derived from the run seed and the episode index, and checkpoints are
taken at episode boundaries, so a resumed run repeats the uninterrupted run exactly.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import shutil
import time
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np
from omegaconf import DictConfig, OmegaConf

from qlab.checkpoint import has_checkpoint, load_checkpoint, save_checkpoint
from qlab.config import flatten, to_container, validate
from qlab.learners import LEARNERS, Learner, Transitions, build_learner, load_target
from qlab.progress import Progress
from qlab.recording import MARKER, SUMMARY, Recorder, atomic_write_json, atomic_write_text
from qlab.shaping import ShapedReward

CHECKPOINT = "checkpoint"


@dataclass
class LoopState:
    """Position of the training loop, saved with every checkpoint."""

    step: int = 0
    episode: int = 0
    next_eval: int = 0
    last_eval: int = -1


#: settings that say where a run is stored, not what it computes (left out of the config hash)
STORAGE_KEYS = ("results_dir", "series_name")


def config_hash(cfg: DictConfig) -> str:
    """Short hash of the resolved config minus storage keys (decides whether a finished run may be skipped)."""
    tree = {k: v for k, v in to_container(cfg).items() if k not in STORAGE_KEYS}
    return hashlib.sha256(json.dumps(tree, sort_keys=True).encode()).hexdigest()[:16]


def episode_seed(run_seed: int, episode: int) -> int:
    """Reset seed of a training episode: a function of the run seed and the episode index only."""
    return int(np.random.SeedSequence([run_seed, episode]).generate_state(1)[0])


def make_task(task: DictConfig) -> gym.Env:
    """The task from its config (``task.id`` plus its parameters), unshaped."""
    params = to_container(task)
    env_id = params.pop("id")
    return gym.make(env_id, **params.pop("params", params))


def shaped(env: gym.Env, shaping_variant: str, gamma: float, progress_scale: float | None) -> gym.Env:
    """``env`` wrapped in a shaping variant unless ``none``."""
    return env if shaping_variant == "none" else ShapedReward(env, shaping_variant, gamma, progress_scale)


def make_env(task: DictConfig, shaping_variant: str, gamma: float, progress_scale: float | None) -> gym.Env:
    """The task from its config, wrapped in a shaping variant unless ``none``."""
    return shaped(make_task(task), shaping_variant, gamma, progress_scale)


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


def start_at_potential(learner: Learner, kind: str, env: gym.Env) -> None:
    """Set Q(s, a) = Phi(s) before learning (Wiewiora 2003), for learners that support it."""
    supported = sorted(k for k, (target, _) in LEARNERS.items() if hasattr(load_target(target), "initialise_from"))
    if not hasattr(learner, "initialise_from"):
        raise ValueError(f"shaping.start_at_potential needs a learner in {supported}, got learner {kind!r}")
    task = env.unwrapped
    if not hasattr(task, "potential"):
        raise ValueError(f"shaping.start_at_potential needs a task with a potential, got {type(task).__name__}")
    learner.initialise_from(task.potential)


def _prepare_folder(run_dir: Path, digest: str) -> dict[str, Any] | None:
    """Return the summary of a finished run with the same config; clear a run whose config changed."""
    marker = run_dir / MARKER
    if marker.exists() and marker.read_text().strip() == digest:
        return json.loads((run_dir / SUMMARY).read_text())
    stored = run_dir / "config.hash"
    if run_dir.exists() and (not stored.exists() or stored.read_text().strip() != digest):
        shutil.rmtree(run_dir)
    return None


def build_run(cfg: DictConfig) -> tuple[gym.Env, gym.Env, Learner]:
    """Training env, evaluation env and learner of a config; a bad setting raises ``ValueError``
    prefixed with its config group (``task:``, ``shaping:``, ``learner:``) before any work."""
    import torch

    torch.set_num_threads(cfg.torch_threads)
    try:
        tasks = [make_task(cfg.task) for _ in range(2)]  # training and evaluation copies
    except (ValueError, TypeError) as err:  # TypeError: a parameter the task does not take (e.g. +task.x=1)
        raise ValueError(f"task ({cfg.task.id}): {err}") from err
    try:
        env, eval_env = (shaped(t, cfg.shaping.variant, cfg.gamma, cfg.shaping.progress_scale) for t in tasks)
    except ValueError as err:
        raise ValueError(f"shaping: {err}") from err
    settings = to_container(cfg.learner)
    kind = settings.pop("kind")
    try:
        learner = build_learner(kind, settings, env.observation_space, env.action_space, cfg.seed)
    except ValueError as err:
        raise ValueError(f"learner ({kind}): {err}") from err
    if cfg.shaping.start_at_potential:
        start_at_potential(learner, kind, env)
    return env, eval_env, learner


def run_experiment(
    cfg: DictConfig, run_dir: Path, bar: bool = True, on_checkpoint: Callable[[int], None] | None = None
) -> dict:
    """Train and evaluate one configuration in ``run_dir``; resume or skip as the folder allows.

    ``on_checkpoint(n)`` is called after the n-th checkpoint of this call is on disk (the tests
    use it to kill the process at a chosen checkpoint).
    """
    validate(cfg)
    env, eval_env, learner = build_run(cfg)
    run_dir = Path(run_dir)
    digest = config_hash(cfg)
    finished = _prepare_folder(run_dir, digest)
    if finished is not None:
        Progress(run_dir.name, 1, False).close(f"already finished ({finished.get('status')}), skipped")
        return finished
    run_dir.mkdir(parents=True, exist_ok=True)
    config_yaml = OmegaConf.to_yaml(cfg, resolve=True)
    atomic_write_text(run_dir / "config.yaml", config_yaml)
    atomic_write_text(run_dir / "config.hash", digest + "\n")
    start_seeds = [cfg.evaluation.start_seed + i for i in range(cfg.evaluation.episodes)]

    loop = LoopState()
    if has_checkpoint(run_dir / CHECKPOINT):
        saved = load_checkpoint(run_dir / CHECKPOINT)
        learner.load_state_dict(saved["learner"])
        loop = LoopState(**saved["loop"])
    recorder = Recorder(run_dir, resume_step=loop.step, tensorboard=cfg.tensorboard)
    budget, gamma = int(cfg.budget_steps), float(cfg.gamma)  # plain numbers: config lookups are slow in the loop
    progress = Progress(run_dir.name, budget, bar)
    if loop.step == 0:
        recorder.text("config", config_yaml)
    checkpoints = 0
    status, diverged_at = "finished", None

    def checkpoint() -> None:
        nonlocal checkpoints
        recorder.commit()
        save_checkpoint(run_dir / CHECKPOINT, {"learner": learner.state_dict(), "loop": dataclasses.asdict(loop)})
        checkpoints += 1
        if on_checkpoint is not None:
            on_checkpoint(checkpoints)

    latest = {"success_rate": float("nan")}

    def run_eval() -> dict[str, float]:
        result = evaluate(learner, eval_env, start_seeds, gamma)
        latest.update(result)
        recorder.scalars(result, loop.step, "eval/")
        loop.last_eval = loop.step
        loop.next_eval = loop.step + cfg.evaluation.every_steps
        return result

    try:
        if loop.step == 0 and loop.last_eval < 0:
            run_eval()
        while loop.step < budget and status == "finished":
            obs, _ = env.reset(seed=episode_seed(cfg.seed, loop.episode))
            tick = time.perf_counter()
            learned: dict[str, list[float]] = defaultdict(list)
            t, train_return, base_return, complete, ok = 0, 0.0, 0.0, False, False
            while loop.step < budget:
                action = learner.act(np.asarray(obs, dtype=np.float32))
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
        final = run_eval() if loop.last_eval != loop.step else _last_eval(recorder, loop.step)
        checkpoint()
    except KeyboardInterrupt:
        recorder.close()
        progress.close("interrupted; re-run the same command to resume from the last checkpoint")
        raise
    summary = {"status": status, "steps": loop.step, "episodes": loop.episode, "diverged_at_step": diverged_at,
               "config_hash": digest, "final": final}
    recorder.hparams(flatten(to_container(cfg)), final)
    recorder.close()
    atomic_write_json(run_dir / SUMMARY, summary)
    atomic_write_text(run_dir / MARKER, digest + "\n")
    note = f"diverged at step {diverged_at}" if status == "diverged" else (
        f"success {final['success_rate']:.2f}, discounted return {final['discounted_return']:.3f}")
    progress.close(note)
    return summary


def _last_eval(recorder: Recorder, step: int) -> dict[str, float]:
    """The evaluation already recorded at ``step`` (when the budget ended on an evaluation)."""
    return {tag.removeprefix("eval/"): v for s, tag, v in recorder.rows if s == step and tag.startswith("eval/")}
