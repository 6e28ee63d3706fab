"""Benchmark the training loop ``qlab-run`` uses against bare loops of the same algorithms (prints a table).

All measurements run side by side in this one process; read the ratios, not the seconds.

1. Tabular Q-learning on Dock (start 15-25 m): environment transitions per second of
   :func:`qlab.experiment.run_experiment` (recording, evaluation and checkpoints included) at the
   default ``copies`` and at ``copies=1``, against a bare scalar Python loop of the same algorithm
   written here (the same drag physics with 4 sub-steps, a 40 x 40 table, epsilon-greedy, one
   Q-learning update per transition). Targets: >= 1.0 at the default ``copies``; ``copies=1`` at
   least 3x the loop this replaced (about 1,800 transitions per second on these machines).
2. Learning per transition: median environment steps to an evaluated success of 0.5 on the demo
   setting at the default ``copies`` within 1.25x of ``copies=1`` (10 seeds, bootstrap interval
   of the ratio of medians), and median wall time to it at least 5x shorter.
3. Batched evaluation of 20 greedy episodes against the same 20 episodes one at a time: >= 5x.
4. The Q-network through ``run_experiment`` against a bare torch loop with bare scalar physics
   doing the same transitions and gradient updates (same network, minibatch, update count): >= 0.8x.

Usage: ``python scripts/bench_training.py [--seeds 10] [--budget 16000] [--throughput-budget 64000] [--rounds 3]``.
"""

from __future__ import annotations

import argparse
import copy
import itertools
import math
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from hydra import compose, initialize_config_dir
from torch import nn

import qlab.experiment as experiment
from qlab.config import CONFIG_DIR, register_configs
from qlab.evaluation import evaluate
from qlab.recording import read_metrics
from qlab.runspec import build_run, make_task_copies, restore_learner
from qlab.tasks.dock import Dock

#: transitions per second of the loop this benchmark's first target refers to (measured before the batched loop)
REPLACED_LOOP = 1_850

DEMO = ["task.start_distance_m=[15.0,25.0]", "task.max_steps=200", "evaluation.episodes=10", "tensorboard=true"]


def compose_run(overrides: list[str]):
    register_configs()
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose(config_name="config", overrides=overrides)


def timed_run(overrides: list[str]) -> tuple[float, Path, float]:
    """Seconds of one ``run_experiment`` call in a fresh folder (kept for reading), and when the call started
    (``time.perf_counter``; composing the config comes before)."""
    folder = Path(tempfile.mkdtemp(prefix="qlab-bench-"))
    cfg = compose_run([*overrides, f"results_dir={folder}"])
    start = time.perf_counter()
    experiment.run_experiment(cfg, folder / "run", bar=False)
    return time.perf_counter() - start, folder / "run", start


class ScalarDock:
    """Dock's physics for one vessel in plain Python floats (the parameters of a :class:`Dock`)."""

    def __init__(self, task: Dock):
        self.t = task
        self.h = task.dt_s / task.substeps
        self.levels = [float(u) for u in task.control_levels[:, 0]]

    def step(self, x: float, v: float, action: int) -> tuple[float, float, bool, bool]:
        t, u = self.t, self.levels[action]
        failed = False
        for _ in range(t.substeps):
            v = v + self.h * (u - t.linear_drag_N_s_per_m * v - t.quadratic_drag_N_s2_per_m2 * v * abs(v)) / t.mass_kg
            x = x + self.h * v
            if x > t.quay_position_m:
                x, failed = t.quay_position_m, v > t.contact_speed_m_s
                v = v if failed else 0.0
            if x < t.channel_end_m:
                x, failed = t.channel_end_m, True
            if failed:
                break
        success = not failed and abs(x) <= t.berth_half_length_m and abs(v) < t.contact_speed_m_s
        return x, v, success, success or failed


def bare_tabular(n_steps: int, seed: int) -> float:
    """Seconds for ``n_steps`` transitions of scalar tabular Q-learning on Dock (alpha 0.1, epsilon 0.1, 40 x 40)."""
    task = Dock(start_distance_m=(15.0, 25.0), max_steps=200)
    dock, rng = ScalarDock(task), np.random.default_rng(seed)
    (x_lo, v_lo), (x_hi, v_hi) = task.state_low, task.state_high
    bins, n_actions, alpha, gamma, epsilon = 40, len(dock.levels), 0.1, 0.99, 0.1
    q = [[0.0] * n_actions for _ in range(bins * bins)]

    def cell(x: float, v: float) -> int:
        i = min(max(int((x - x_lo) / (x_hi - x_lo) * bins), 0), bins - 1)
        j = min(max(int((v - v_lo) / (v_hi - v_lo) * bins), 0), bins - 1)
        return i * bins + j

    start = time.perf_counter()
    x, v, t = -float(rng.uniform(15.0, 25.0)), 0.0, 0
    s = cell(x, v)
    for _ in range(n_steps):
        row = q[s]
        a = int(rng.integers(n_actions)) if rng.random() < epsilon else row.index(max(row))
        x, v, success, terminated = dock.step(x, v, a)
        t += 1
        s2 = cell(x, v)
        target = float(success) + (0.0 if terminated else gamma * max(q[s2]))
        row[a] += alpha * (target - row[a])
        if terminated or t >= 200:
            x, v, t = -float(rng.uniform(15.0, 25.0)), 0.0, 0
            s2 = cell(x, v)
        s = s2
    return time.perf_counter() - start


def bare_qnet(n_steps: int, seed: int, cfg) -> tuple[float, int]:
    """Seconds and updates of a bare DQN loop on scalar Dock physics with the run's network and update schedule."""
    task = Dock(start_distance_m=(15.0, 25.0), max_steps=200)
    dock, rng = ScalarDock(task), np.random.default_rng(seed)
    c = cfg.learner
    torch.manual_seed(seed)
    sizes = [2, *c.hidden_sizes, len(dock.levels)]
    layers: list[nn.Module] = []
    for a, b in itertools.pairwise(sizes):
        layers += [nn.Linear(a, b), nn.ReLU()]
    online = nn.Sequential(*layers[:-1])
    target = copy.deepcopy(online)
    opt = torch.optim.Adam(online.parameters(), lr=c.learning_rate)
    cap = int(c.replay_capacity)
    obs_buf, next_buf = np.zeros((cap, 2), np.float32), np.zeros((cap, 2), np.float32)
    act_buf, rew_buf, done_buf = np.zeros(cap, np.int64), np.zeros(cap, np.float32), np.zeros(cap, np.float32)
    start, filled, updates = time.perf_counter(), 0, 0
    x, v, t = -float(rng.uniform(15.0, 25.0)), 0.0, 0
    for i in range(n_steps):
        eps = max(c.epsilon.end, c.epsilon.start + (c.epsilon.end - c.epsilon.start) * i / c.epsilon.horizon)
        if rng.random() < eps:
            a = int(rng.integers(len(dock.levels)))
        else:
            with torch.no_grad():
                a = int(online(torch.tensor([[x, v]], dtype=torch.float32)).argmax())
        x2, v2, success, terminated = dock.step(x, v, a)
        k = i % cap
        obs_buf[k], act_buf[k], rew_buf[k], next_buf[k], done_buf[k] = (x, v), a, float(success), (x2, v2), terminated
        filled = min(filled + 1, cap)
        t += 1
        x, v = (x2, v2)
        if terminated or t >= 200:
            x, v, t = -float(rng.uniform(15.0, 25.0)), 0.0, 0
        if i + 1 >= c.warmup_steps and (i + 1) % c.update_every == 0:
            idx = rng.integers(0, filled, size=c.batch_size)
            o, n = torch.from_numpy(obs_buf[idx]), torch.from_numpy(next_buf[idx])
            with torch.no_grad():
                boot = target(n).max(dim=1).values
                y = torch.from_numpy(rew_buf[idx]) + c.gamma * (1 - torch.from_numpy(done_buf[idx])) * boot
            qsa = online(o).gather(1, torch.from_numpy(act_buf[idx])[:, None])[:, 0]
            loss = nn.functional.huber_loss(qsa, y)
            opt.zero_grad()
            loss.backward()
            nn.utils.clip_grad_norm_(online.parameters(), c.grad_clip_norm)
            opt.step()
            updates += 1
            if updates % c.target_update_every == 0:
                target.load_state_dict(online.state_dict())
    return time.perf_counter() - start, updates


def steps_and_seconds_to_half(overrides: list[str]) -> tuple[float, float]:
    """First evaluated step with success >= 0.5 (inf if never) and the wall seconds from the start of the run
    (``run_experiment`` called) to the end of that evaluation."""
    stamps: list[float] = []
    original = experiment.evaluate

    def stamped(*args, **kwargs):
        result = original(*args, **kwargs)
        stamps.append(time.perf_counter())
        return result

    experiment.evaluate = stamped
    try:
        _, run, start = timed_run(overrides)
    finally:
        experiment.evaluate = original
    evals = sorted((s, v) for s, tag, v in read_metrics(run) if tag == "eval/success")
    for (step, value), stamp in zip(evals, stamps, strict=True):
        if value >= 0.5:
            return float(step), stamp - start
    return float("inf"), float("inf")


def ratio_interval(a: np.ndarray, b: np.ndarray, n_resamples: int = 2000, seed: int = 0) -> tuple[float, float]:
    """95% percentile bootstrap interval of median(a) / median(b), the two groups resampled independently."""
    rng = np.random.default_rng(seed)
    ia, ib = rng.integers(0, a.size, (n_resamples, a.size)), rng.integers(0, b.size, (n_resamples, b.size))
    with np.errstate(invalid="ignore"):
        ratios = np.median(a[ia], axis=1) / np.median(b[ib], axis=1)
    return tuple(float(q) for q in np.percentile(ratios, [2.5, 97.5]))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--budget", type=int, default=16_000, help="steps of the learning-per-transition runs")
    parser.add_argument("--throughput-budget", type=int, default=64_000, help="steps of the transitions/s runs")
    parser.add_argument("--rounds", type=int, default=3, help="interleaved repeats of the transitions/s runs")
    args = parser.parse_args()
    torch.set_num_threads(1)
    rows = []

    budget = args.budget
    timed_run([*DEMO, "budget_steps=400", "evaluation.every_steps=400"])  # imports (tensorboard) outside the timing
    rate = args.throughput_budget
    loops = {"single": ["copies=1"], "default": [], "wide": ["copies=64"]}
    best = {"bare": math.inf} | {k: math.inf for k in loops}
    for _ in range(args.rounds):  # interleaved, best of each: the machine's speed drifts between runs
        best["bare"] = min(best["bare"], bare_tabular(rate, 0))
        for name, extra in loops.items():
            seconds, _, _ = timed_run([*DEMO, f"budget_steps={rate}", "evaluation.every_steps=2000", *extra])
            best[name] = min(best[name], seconds)
    t_bare, t_single, t_default, t_wide = best["bare"], best["single"], best["default"], best["wide"]
    rows.append(("tabular loop, default copies / bare scalar loop", t_bare / t_default, ">= 1.0"))
    rows.append(("tabular loop, copies=64 / bare scalar loop", t_bare / t_wide, "(for reference)"))
    rows.append((f"tabular loop, copies=1 / bare scalar loop ({rate / t_single:,.0f} transitions/s)", t_bare / t_single,
                 f">= {3 * REPLACED_LOOP / (rate / t_bare):.3f} (3x the replaced loop's {REPLACED_LOOP:,}/s)"))
    print(f"transitions/s over {rate:,} (best of {args.rounds}): bare {rate / t_bare:,.0f}, copies=1 "
          f"{rate / t_single:,.0f}, default copies {rate / t_default:,.0f}, copies=64 {rate / t_wide:,.0f}", flush=True)

    found: dict[str, list[tuple[float, float]]] = {"default": [], "single": []}
    for seed in range(args.seeds):  # the two settings interleaved, seed by seed
        for label, extra in (("default", []), ("single", ["copies=1"])):
            found[label].append(steps_and_seconds_to_half([*DEMO, f"budget_steps={budget}", f"seed={seed}",
                                                           "evaluation.every_steps=400", *extra]))
    results = {label: np.array(pairs) for label, pairs in found.items()}
    for label, pairs in results.items():
        print(f"{label}: steps to 0.5 {pairs[:, 0].tolist()}", flush=True)
    steps_d, steps_s = results["default"][:, 0], results["single"][:, 0]
    ratio = float(np.median(steps_d) / np.median(steps_s))
    low, high = ratio_interval(steps_d, steps_s)
    rows.append((f"median steps to 0.5, default copies / copies=1 [95% CI {low:.2f}, {high:.2f}]", ratio, "<= 1.25"))
    wall = float(np.median(results["single"][:, 1]) / np.median(results["default"][:, 1]))
    rows.append(("median wall time to 0.5, copies=1 / default copies", wall, ">= 5"))

    cfg = compose_run([*DEMO, "budget_steps=16000"])
    _, _, learner = build_run(cfg)
    seeds = list(range(1_000_000, 1_000_020))
    batch = make_task_copies(cfg, 20)
    singles = [make_task_copies(cfg, 1) for _ in seeds]
    start = time.perf_counter()
    together = evaluate(learner, batch, seeds, 0.99)
    t_batch = time.perf_counter() - start
    start = time.perf_counter()
    alone = [evaluate(learner, c, [s], 0.99) for c, s in zip(singles, seeds, strict=True)]
    t_alone = time.perf_counter() - start
    assert np.isclose(together["discounted_return"], np.mean([a["discounted_return"] for a in alone]))
    rows.append(("evaluation of 20 episodes, one at a time / batched", t_alone / t_batch, ">= 5"))

    qnet = [*DEMO, "learner=qnet", "budget_steps=8000", "evaluation.every_steps=2000"]
    t_loop = t_bare_q = math.inf
    for _ in range(args.rounds):
        seconds, run, _ = timed_run(qnet)
        t_loop = min(t_loop, seconds)
        seconds, bare_updates = bare_qnet(8000, 0, compose_run(qnet))
        t_bare_q = min(t_bare_q, seconds)
    updates = restore_learner(run)[0].updates
    rows.append((f"Q-network loop / bare torch loop ({int(updates)} vs {bare_updates} updates)", t_bare_q / t_loop,
                 ">= 0.8"))

    width = max(len(r[0]) for r in rows)
    print(f"\n{'measure':<{width}}  ratio   target")
    for name, value, target in rows:
        print(f"{name:<{width}}  {value:6.3g}  {target}")


if __name__ == "__main__":
    main()
