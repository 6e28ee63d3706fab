"""Benchmark batched task stepping and the replay memory, side by side in one process (prints a table).

(The Q-network through the training loop against a bare torch loop is in ``bench_training.py``.)

1. Dock stepped as 1,024 copies in one ``TaskBatch`` against 1,024 gymnasium environments
   stepped one at a time. Ratio of transitions per second, target >= 50.
2. Replay memory: bytes allocated by a filled ``ReplayBuffer`` (traced with ``tracemalloc``)
   against the raw bytes of the transitions it holds. Target <= 1.1.

Each timing is the best of ``--repeats`` interleaved runs (robust to a busy machine).
Usage: ``python scripts/bench_qnet.py [--repeats 3]``.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import gymnasium as gym
import numpy as np
import torch

import qlab  # noqa: F401  (registers the tasks)
from qlab.learners.protocol import Transitions
from qlab.learners.replay import ReplayBuffer
from qlab.tasks.batch import TaskBatch


def _dock_batched(n_copies: int, n_steps: int, seed: int) -> float:
    """Seconds for ``n_steps`` steps of ``n_copies`` Dock copies in one TaskBatch (done copies reset)."""
    batch = TaskBatch(gym.make("qlab/Dock-v0").unwrapped, n_copies)
    rng = np.random.default_rng(seed)
    batch.reset(None, seed + np.arange(n_copies))
    start = time.perf_counter()
    for _ in range(n_steps):
        batch.step(rng.integers(0, 5, n_copies))
        if batch.done.any():
            batch.reset(batch.done, rng.integers(0, 2**31, int(batch.done.sum())))
    return time.perf_counter() - start


def _dock_one_at_a_time(n_copies: int, n_steps: int, seed: int) -> float:
    """Seconds for ``n_steps`` rounds of stepping ``n_copies`` gymnasium Dock environments one by one."""
    envs = [gym.make("qlab/Dock-v0") for _ in range(n_copies)]
    for i, env in enumerate(envs):
        env.reset(seed=seed + i)
    rng = np.random.default_rng(seed)
    start = time.perf_counter()
    for _ in range(n_steps):
        for env, action in zip(envs, rng.integers(0, 5, n_copies), strict=True):
            _, _, terminated, truncated, _ = env.step(int(action))
            if terminated or truncated:
                env.reset()
    return time.perf_counter() - start


def _replay_memory(n_transitions: int, obs_dim: int) -> tuple[int, int]:
    """(bytes allocated by a filled buffer, raw bytes of the stored transitions)."""
    rng = np.random.default_rng(0)
    tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0]
    buffer = ReplayBuffer(n_transitions, obs_dim, gamma=0.99, n_step=3)
    raw = 0
    for _ in range(n_transitions // 256):
        batch = Transitions(
            obs=rng.normal(size=(256, obs_dim)).astype(np.float32), action=rng.integers(0, 5, 256),
            reward=rng.normal(size=256), next_obs=rng.normal(size=(256, obs_dim)).astype(np.float32),
            terminated=rng.random(256) < 0.01, truncated=np.zeros(256, bool),
        )
        buffer.add(batch)
        raw += sum(getattr(batch, f).nbytes for f in ("obs", "action", "reward", "next_obs", "terminated", "truncated"))
        del batch
    held = tracemalloc.get_traced_memory()[0] - before
    tracemalloc.stop()
    return held, raw


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3, help="interleaved runs; the best time counts")
    args = parser.parse_args()
    torch.set_num_threads(1)

    n_copies, n_steps = 1_024, 20
    batched_s = min(_dock_batched(n_copies, n_steps, seed=r) for r in range(args.repeats))
    single_s = min(_dock_one_at_a_time(n_copies, n_steps, seed=r) for r in range(args.repeats))
    held, raw = _replay_memory(200_000, obs_dim=4)

    rows = [
        (f"Dock x{n_copies} TaskBatch (transitions/s)", n_copies * n_steps / batched_s, "one at a time",
         n_copies * n_steps / single_s, single_s / batched_s, ">= 50"),
        ("replay buffer, 200k transitions (MB)", held / 1e6, "raw transitions", raw / 1e6, held / raw, "<= 1.1"),
    ]
    print(f"{'measure':42s} {'value':>14s}  {'against':16s} {'value':>14s} {'ratio':>8s}  target")
    for name, value, other_name, other, ratio, target in rows:
        print(f"{name:42s} {value:14.1f}  {other_name:16s} {other:14.1f} {ratio:8.2f}  {target}")


if __name__ == "__main__":
    main()
