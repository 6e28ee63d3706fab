"""Benchmark: vectorised value iteration against a plain per-state loop, and sweep cost vs MDP size.

The loop comparison uses a random sparse MDP shaped like a grid model of Dock (states on a 2-D
grid, 5 actions, each next state spread over 4 neighbouring nodes); the scaling table uses the
real Dock grid model (qlab.reference.dock_grid) from 1e3 to 1e6 nodes. Timings only; nothing
here is a test.

    python scripts/bench_value_iteration.py --loop-states 10000 --sizes 1000 10000 100000 1000000
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.sparse as sp

from qlab.reference.dock_grid import DockGrid
from qlab.reference.finite_mdp import TransitionModel
from qlab.tasks.dock import Dock

GAMMA = 0.99


def dock_like_mdp(n_states: int, n_actions: int, rng: np.random.Generator) -> tuple[list[sp.csr_array], np.ndarray]:
    """Random sparse MDP: per-action (S, S) CSR matrices with 4 interpolation weights a row, and R (S, A)."""
    width = max(2, round(np.sqrt(n_states)))
    states = np.arange(n_states)
    mats = []
    for a in range(n_actions):
        drift = rng.integers(-2, 3, size=n_states) * width + (a - n_actions // 2)  # row shift + action's column shift
        base = states + drift
        corners = np.stack([base, base + 1, base + width, base + width + 1], axis=1).clip(0, n_states - 1)
        u, w = rng.random((2, n_states))
        weights = np.stack([(1 - u) * (1 - w), u * (1 - w), (1 - u) * w, u * w], axis=1)
        indptr = np.arange(0, 4 * n_states + 1, 4)
        mats.append(sp.csr_array((weights.ravel(), corners.ravel(), indptr), shape=(n_states, n_states)))
    return mats, rng.normal(size=(n_states, n_actions))


def vectorised_sweeps(model: TransitionModel, R: np.ndarray, n_sweeps: int) -> np.ndarray:
    """``n_sweeps`` value-iteration sweeps from V = 0 with the library's backup (as in ``value_iteration``)."""
    rewards_by_action = np.ascontiguousarray(R.T)
    V = np.zeros(model.n_states)
    for _ in range(n_sweeps):
        V = model.backup_by_action(rewards_by_action, GAMMA, V).max(axis=0)
    return V


def per_state_loop_sweeps(mats: list[sp.csr_array], R: np.ndarray, n_sweeps: int) -> np.ndarray:
    """The same sweeps written as a plain Python loop over states, actions and successors."""
    n_states, n_actions = R.shape
    rows = [(m.indptr.tolist(), m.indices.tolist(), m.data.tolist()) for m in mats]
    rewards = R.tolist()
    V = [0.0] * n_states
    for _ in range(n_sweeps):
        V_next = [0.0] * n_states
        for s in range(n_states):
            best = -float("inf")
            for a in range(n_actions):
                indptr, indices, data = rows[a]
                expected = 0.0
                for k in range(indptr[s], indptr[s + 1]):
                    expected += data[k] * V[indices[k]]
                best = max(best, rewards[s][a] + GAMMA * expected)
            V_next[s] = best
        V = V_next
    return np.array(V)


def compare_with_loop(n_states: int, n_actions: int, n_sweeps: int, seed: int) -> None:
    """Print the speed ratio of vectorised sweeps over the per-state loop on one MDP."""
    mats, R = dock_like_mdp(n_states, n_actions, np.random.default_rng(seed))
    model = TransitionModel.build(mats)
    start = time.perf_counter()
    V_fast = vectorised_sweeps(model, R, n_sweeps)
    fast_s = time.perf_counter() - start
    start = time.perf_counter()
    V_loop = per_state_loop_sweeps(mats, R, n_sweeps)
    loop_s = time.perf_counter() - start
    print(f"\nValue iteration, {n_states} states x {n_actions} actions, {n_sweeps} sweeps, gamma = {GAMMA}")
    print(f"{'method':<26}{'total s':>10}{'ms / sweep':>12}")
    print(f"{'vectorised (sparse matvec)':<26}{fast_s:>10.4f}{1e3 * fast_s / n_sweeps:>12.3f}")
    print(f"{'per-state Python loop':<26}{loop_s:>10.4f}{1e3 * loop_s / n_sweeps:>12.3f}")
    print(f"speed ratio: {loop_s / fast_s:.0f}x   max |V_vectorised - V_loop| = {np.max(np.abs(V_fast - V_loop)):.2e}")


def sweep_scaling(sizes: list[int], repeats: int) -> None:
    """Print build time and time per sweep as the Dock grid model grows (the real task, default parameters)."""
    print(f"\nOne sweep vs size of the Dock grid model (default Dock, median of {repeats} sweeps)")
    print(f"{'nodes':>10}{'grid':>13}{'nonzeros':>12}{'build s':>10}{'ms / sweep':>12}{'ns / node':>12}")
    for n_nodes in sizes:
        n_velocity = max(2, round(np.sqrt(n_nodes / 2)))
        n_position = max(2, round(n_nodes / n_velocity))
        start = time.perf_counter()
        grid = DockGrid(Dock(), n_position, n_velocity)
        model = TransitionModel.build(grid.transitions)
        build_s = time.perf_counter() - start
        rewards_by_action = np.ascontiguousarray(grid.rewards("none", GAMMA).T)
        V = np.zeros(model.n_states)
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            V = model.backup_by_action(rewards_by_action, GAMMA, V).max(axis=0)
            times.append(time.perf_counter() - start)
        sweep_s = float(np.median(times))
        shape = f"{n_position}x{n_velocity}"
        print(f"{grid.n_grid:>10}{shape:>13}{model.stacked.nnz:>12}{build_s:>10.2f}{1e3 * sweep_s:>12.3f}"
              f"{1e9 * sweep_s / grid.n_grid:>12.1f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--loop-states", type=int, default=10_000, help="states in the loop comparison")
    parser.add_argument("--sweeps", type=int, default=20, help="sweeps in the loop comparison")
    parser.add_argument("--sizes", type=int, nargs="+", default=[1_000, 10_000, 100_000, 1_000_000])
    parser.add_argument("--actions", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=7, help="timed sweeps per size")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    for name in ("loop_states", "sweeps", "actions", "repeats"):
        if getattr(args, name) < 1:
            parser.error(f"--{name.replace('_', '-')} must be at least 1")
    if min(args.sizes) < 4:
        parser.error("--sizes must all be at least 4 states")
    compare_with_loop(args.loop_states, args.actions, args.sweeps, args.seed)
    sweep_scaling(args.sizes, args.repeats)


if __name__ == "__main__":
    main()
