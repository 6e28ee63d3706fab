"""Benchmark the Q-network learner's overheads, side by side in one process (prints a table).

1. Learner loop vs bare torch loop: ``QNetLearner`` on Dock (act + env step + learn) against a
   minimal hand-written DQN loop doing the same environment steps with the same network, the
   same minibatch size and the same number of gradient updates. Ratio of steps per second,
   target >= 0.8.
2. Dock stepped as 1,024 copies in one ``TaskBatch`` against 1,024 gymnasium environments
   stepped one at a time. Ratio of transitions per second, target >= 50.
3. Replay memory: bytes allocated by a filled ``ReplayBuffer`` (traced with ``tracemalloc``)
   against the raw bytes of the transitions it holds. Target <= 1.1.

Each timing is the best of ``--repeats`` interleaved runs (robust to a busy machine).
Usage: ``python scripts/bench_qnet.py [--steps 4000] [--repeats 3]``.
"""

from __future__ import annotations

import argparse
import copy
import time
import tracemalloc

import gymnasium as gym
import numpy as np
import torch
from torch import nn

import qlab  # noqa: F401  (registers the tasks)
from qlab.learners.protocol import Transitions
from qlab.learners.qnet import QNetConfig, QNetLearner
from qlab.learners.replay import ReplayBuffer
from qlab.learners.schedules import ScheduleConfig
from qlab.tasks.batch import TaskBatch

CONFIG = QNetConfig(
    hidden_sizes=[64, 64], gamma=0.99, learning_rate=1e-3, batch_size=64, replay_capacity=50_000,
    warmup_steps=500, update_every=1, target_update_every=250, loss="huber", double_estimator=False, n_step=1,
    epsilon=ScheduleConfig("linear", 1.0, 0.1, 2_000.0), grad_clip_norm=10.0,
)


def _learner_loop(n_steps: int, seed: int) -> tuple[float, int]:
    """QNetLearner on Dock: seconds for ``n_steps`` env steps, and the number of updates made."""
    env = gym.make("qlab/Dock-v0")
    learner = QNetLearner(env.observation_space, env.action_space, CONFIG, seed=seed)
    obs, _ = env.reset(seed=seed)
    start = time.perf_counter()
    for _ in range(n_steps):
        action = learner.act(obs[None])[0]
        next_obs, reward, terminated, truncated, _ = env.step(action)
        learner.learn(Transitions.single(obs, action, reward, next_obs, terminated, truncated))
        obs = env.reset()[0] if terminated or truncated else next_obs
    return time.perf_counter() - start, learner.updates


def _bare_loop(n_steps: int, seed: int) -> tuple[float, int]:
    """The same steps and updates written directly: numpy ring buffer, torch network, no checks, no metrics."""
    env = gym.make("qlab/Dock-v0")
    obs_dim, n_actions, cfg = env.observation_space.shape[0], env.action_space.n, CONFIG
    torch.manual_seed(seed)
    net = nn.Sequential(nn.Linear(obs_dim, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, n_actions))
    target = copy.deepcopy(net).requires_grad_(False)
    opt = torch.optim.Adam(net.parameters(), lr=cfg.learning_rate)
    cap = cfg.replay_capacity
    b_obs, b_next = np.zeros((cap, obs_dim), np.float32), np.zeros((cap, obs_dim), np.float32)
    b_act, b_rew, b_term = np.zeros(cap, np.int64), np.zeros(cap, np.float32), np.zeros(cap, np.float32)
    rng = np.random.default_rng(seed)
    obs, _ = env.reset(seed=seed)
    updates, size = 0, 0
    start = time.perf_counter()
    for t in range(n_steps):
        eps = max(cfg.epsilon.end, cfg.epsilon.start + (cfg.epsilon.end - cfg.epsilon.start) * t / cfg.epsilon.horizon)
        if rng.random() < eps:
            action = int(rng.integers(n_actions))
        else:
            with torch.no_grad():
                action = int(net(torch.from_numpy(obs)[None]).argmax())
        next_obs, reward, terminated, truncated, _ = env.step(action)
        i = t % cap
        b_obs[i], b_next[i], b_act[i], b_rew[i], b_term[i] = obs, next_obs, action, reward, terminated
        size = min(size + 1, cap)
        obs = env.reset()[0] if terminated or truncated else next_obs
        if t + 1 >= cfg.warmup_steps and size >= cfg.batch_size:
            idx = rng.integers(0, size, cfg.batch_size)
            with torch.no_grad():
                boot = target(torch.from_numpy(b_next[idx])).max(1).values
                y = torch.from_numpy(b_rew[idx]) + cfg.gamma * (1.0 - torch.from_numpy(b_term[idx])) * boot
            q = net(torch.from_numpy(b_obs[idx])).gather(1, torch.from_numpy(b_act[idx])[:, None]).squeeze(1)
            loss = nn.functional.huber_loss(q, y)
            opt.zero_grad()
            loss.backward()
            nn.utils.clip_grad_norm_(net.parameters(), cfg.grad_clip_norm)
            opt.step()
            updates += 1
            if updates % cfg.target_update_every == 0:
                target.load_state_dict(net.state_dict())
    return time.perf_counter() - start, updates


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
    parser.add_argument("--steps", type=int, default=4_000, help="env steps per learner-loop run")
    parser.add_argument("--repeats", type=int, default=3, help="interleaved runs; the best time counts")
    args = parser.parse_args()
    torch.set_num_threads(1)

    learner_s, bare_s, updates = np.inf, np.inf, set()
    for r in range(args.repeats):
        t, u1 = _learner_loop(args.steps, seed=r)
        learner_s = min(learner_s, t)
        t, u2 = _bare_loop(args.steps, seed=r)
        bare_s = min(bare_s, t)
        updates |= {u1, u2}
    n_copies, n_steps = 1_024, 20
    batched_s = min(_dock_batched(n_copies, n_steps, seed=r) for r in range(args.repeats))
    single_s = min(_dock_one_at_a_time(n_copies, n_steps, seed=r) for r in range(args.repeats))
    held, raw = _replay_memory(200_000, obs_dim=4)

    rows = [
        ("learner loop, Dock (steps/s)", args.steps / learner_s, "bare torch loop", args.steps / bare_s,
         bare_s / learner_s, ">= 0.8"),
        (f"Dock x{n_copies} TaskBatch (transitions/s)", n_copies * n_steps / batched_s, "one at a time",
         n_copies * n_steps / single_s, single_s / batched_s, ">= 50"),
        ("replay buffer, 200k transitions (MB)", held / 1e6, "raw transitions", raw / 1e6, held / raw, "<= 1.1"),
    ]
    print(f"gradient updates per learner-loop run: {sorted(updates)} (same in both loops)")
    print(f"{'measure':42s} {'value':>14s}  {'against':16s} {'value':>14s} {'ratio':>8s}  target")
    for name, value, other_name, other, ratio, target in rows:
        print(f"{name:42s} {value:14.1f}  {other_name:16s} {other:14.1f} {ratio:8.2f}  {target}")


if __name__ == "__main__":
    main()
