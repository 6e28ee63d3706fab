"""Step many copies of one task at once, in numpy, through the task's own ``batch_step``.

Every copy owns a random stream, seeded as gymnasium's ``Env.reset(seed=s)`` seeds a single
environment (``gymnasium.utils.seeding.np_random(s)``). The task's physics draws its noise from
a :class:`CopyStreams`, which hands row ``i`` of every request to copy ``i``'s generator, so a
copy reset with seed ``s`` and stepped with actions ``a1, a2, ...`` follows the single
environment's ``reset(seed=s)``, ``step(a1)``, ``step(a2)``, ... draw for draw, whatever the other
copies do. Observations, rewards and flags are then the same bit for bit, except where a task's
physics rounds differently on ``N`` rows than on one: ``LinearQuadratic`` multiplies matrices
(``x @ A.T``), whose BLAS summation order depends on the number of rows, so its states agree
to round-off (about 1e-16 relative).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from gymnasium import spaces
from gymnasium.utils import seeding

from qlab.shaping import check_variant, shaping_bonus
from qlab.tasks.base import ControlTask
from qlab.validation import require_int

_UINT64 = (1 << 64) - 1


@dataclass(frozen=True)
class BatchTransition:
    """One step of the stepped copies: observations before/after, rewards and episode flags (one row per copy)."""

    obs: np.ndarray
    action: np.ndarray
    reward: np.ndarray  # training reward (base + shaping bonus)
    base_reward: np.ndarray
    next_obs: np.ndarray
    terminated: np.ndarray
    truncated: np.ndarray  # time cap reached without termination; never together with terminated
    success: np.ndarray


class CopyStreams:
    """Stands in for a numpy ``Generator`` in a task's physics: one generator per row.

    Every request must have size ``(N, ...)`` with ``N`` the number of generators; row ``i`` is
    drawn by generator ``i`` exactly as a single environment draws a request of size ``(1, ...)``.
    Provides the methods qlab's tasks use: ``uniform``, ``standard_normal`` and ``normal``.
    """

    def __init__(self, generators: Sequence[np.random.Generator]):
        self.generators = generators

    def _shape(self, size: int | Sequence[int] | None) -> tuple[int, ...]:
        shape = () if size is None else (int(size),) if np.ndim(size) == 0 else tuple(int(s) for s in size)
        if not shape or shape[0] != len(self.generators):
            raise ValueError(f"draws need size (N, ...) with N = {len(self.generators)} copies, got size {size!r}")
        return shape

    def _rows(self, shape: tuple[int, ...],
              draw: Callable[[np.random.Generator, tuple[int, ...]], np.ndarray]) -> np.ndarray:
        """Row ``i`` of ``shape`` drawn by generator ``i`` as ``draw(generator, (1, *shape[1:]))``."""
        row = (1, *shape[1:])
        return np.concatenate([draw(g, row) for g in self.generators]).reshape(shape)

    def uniform(self, low: Any = 0.0, high: Any = 1.0, size: int | Sequence[int] | None = None) -> np.ndarray:
        """Uniform draws on ``[low, high)`` (broadcast to ``size``): ``low + (high - low) * U``, numpy's own formula."""
        return low + np.subtract(high, low) * self._rows(self._shape(size), lambda g, row: g.random(row))

    def standard_normal(self, size: int | Sequence[int] | None = None, dtype: Any = np.float64) -> np.ndarray:
        """Standard normal draws."""
        return self._rows(self._shape(size), lambda g, row: g.standard_normal(size=row, dtype=dtype))

    def normal(self, loc: Any = 0.0, scale: Any = 1.0, size: int | Sequence[int] | None = None) -> np.ndarray:
        """Normal draws with mean ``loc`` and standard deviation ``scale``: ``loc + scale * Z``, numpy's own formula."""
        return loc + np.asarray(scale) * self.standard_normal(size)


def copy_mask(n: int, which: np.ndarray | None) -> np.ndarray:
    """``which`` as a boolean mask over ``n`` copies (``None``: every copy)."""
    if which is None:
        return np.ones(n, dtype=bool)
    mask = np.asarray(which)
    if mask.dtype != bool or mask.shape != (n,):
        raise ValueError(f"copy masks must be boolean arrays of shape ({n},), got {mask.dtype} {mask.shape}")
    return mask


def mask_seeds(mask: np.ndarray, seeds: Sequence[int] | np.ndarray) -> list[int]:
    """The reset seeds of the masked copies as Python ints, one per selected copy."""
    seeds = np.asarray(seeds).reshape(-1)
    if seeds.size != int(mask.sum()) or (seeds.size and not np.issubdtype(seeds.dtype, np.integer)):
        raise ValueError(f"reset needs one integer seed per selected copy ({int(mask.sum())}), got {seeds!r}")
    return [int(s) for s in seeds]


class TaskBatch:
    """``N`` independent copies of a qlab task, stepped together, each with its own random stream.

    No copy has an episode until :meth:`reset` starts one. There is no automatic reset: a copy
    whose episode ended keeps its final state and is ``done`` until :meth:`reset` is called for
    it, so no transition ever crosses an episode boundary. The whole batch (states, step counts,
    flags, generator states) saves to numpy arrays with :meth:`state_dict`.
    """

    savable = True

    def __init__(
        self,
        task: ControlTask,
        n: int,
        shaping: str = "none",
        gamma: float = 0.99,
        progress_scale: float | None = None,
    ):
        self.task = task
        self.n = require_int("n", n, 1)
        self.shaping = check_variant(shaping, task.shaping_variants)
        self.gamma = float(gamma)
        self.progress_scale = task.default_progress_scale if progress_scale is None else float(progress_scale)
        self.generators: list[np.random.Generator | None] = [None] * self.n
        self.streams = CopyStreams(self.generators)  # every copy's stream; sees the list's updates in place
        self.state: np.ndarray | None = None  # (N, state_dim), allocated by the first reset
        self.elapsed = np.zeros(self.n, dtype=np.int64)
        self.done = np.ones(self.n, dtype=bool)

    @property
    def observation_space(self) -> spaces.Space:
        """Observation space of one copy."""
        return self.task.observation_space

    @property
    def action_space(self) -> spaces.Space:
        """Action space of one copy."""
        return self.task.action_space

    def observe(self) -> np.ndarray:
        """Current observations of every copy, shape ``(N, obs_dim)``."""
        if self.state is None:
            raise RuntimeError("call reset() before observe() or step()")
        return self.task.observe(self.state)

    def reset(self, which: np.ndarray | None, seeds: Sequence[int] | np.ndarray) -> np.ndarray:
        """Start new episodes for the copies in the boolean mask ``which`` (``None``: all), seeded by ``seeds``.

        Copy ``i`` with seed ``s`` gets the generator ``gymnasium.utils.seeding.np_random(s)``, as
        ``Env.reset(seed=s)`` does. Returns the observations of every copy, ``(N, obs_dim)``.
        """
        mask = copy_mask(self.n, which)
        rows = np.flatnonzero(mask)
        for i, seed in zip(rows, mask_seeds(mask, seeds), strict=True):
            self.generators[i] = seeding.np_random(seed)[0]
        if rows.size:
            start = self.task.sample_start(rows.size, CopyStreams([self.generators[i] for i in rows]))
            if self.state is None:
                self.state = np.zeros((self.n, start.shape[1]))
            self.state[rows] = start
            self.elapsed[rows] = 0
            self.done[rows] = False
        return self.observe()

    def step(self, action: np.ndarray, active: np.ndarray | None = None) -> BatchTransition:
        """Step the copies in the boolean mask ``active`` (``None``: all) with one action row per active copy.

        Returns the transitions of the active copies, in copy order. Stepping a copy that is
        ``done`` (or never reset) raises ``RuntimeError``.
        """
        every = active is None
        rows = slice(None) if every else np.flatnonzero(copy_mask(self.n, active))
        count = self.n if every else rows.size
        if count == 0:
            raise ValueError("step needs at least one active copy")
        if (self.done.any() if every else self.done[rows].any()):
            raise RuntimeError("some active copies have no running episode; reset them before stepping")
        action = np.asarray(action)
        if action.shape[:1] != (count,):
            raise ValueError(f"step needs one action per active copy ({count}), got shape {action.shape}")
        state = self.state[rows]
        obs = self.task.observe(state)
        streams = self.streams if every else CopyStreams([self.generators[i] for i in rows])
        out = self.task.batch_step(state, self.task.controls(action), streams)
        self.state[rows] = out.next_state
        self.elapsed[rows] += 1
        next_obs = self.task.observe(out.next_state)
        terminated = out.terminated.astype(bool)
        truncated = ~terminated & (self.elapsed[rows] >= self.task.max_steps)
        self.done[rows] = terminated | truncated
        bonus = shaping_bonus(self.shaping, self.task, obs, next_obs, terminated, self.gamma, self.progress_scale)
        return BatchTransition(
            obs=obs,
            action=action,
            reward=out.base_reward + bonus,
            base_reward=out.base_reward,
            next_obs=next_obs,
            terminated=terminated,
            truncated=truncated,
            success=out.success.astype(bool),
        )

    # --- checkpoints ------------------------------------------------------------------------

    def state_dict(self) -> dict[str, Any]:
        """States, step counts, done flags and every copy's PCG64 state, as numpy arrays (copies).

        The 128-bit PCG64 ``state`` and ``inc`` are split into ``(N, 2)`` uint64 arrays ``[high, low]``.
        """
        if self.state is None or any(g is None for g in self.generators):
            raise RuntimeError("reset every copy at least once before saving the batch")
        bits = [g.bit_generator.state for g in self.generators]
        if any(b["bit_generator"] != "PCG64" for b in bits):
            raise ValueError("only PCG64 generators can be saved")
        return {
            "state": self.state.copy(),
            "elapsed": self.elapsed.copy(),
            "done": self.done.copy(),
            "pcg64_state": _split([b["state"]["state"] for b in bits]),
            "pcg64_inc": _split([b["state"]["inc"] for b in bits]),
            "has_uint32": np.array([b["has_uint32"] for b in bits], dtype=np.int64),
            "uinteger": np.array([b["uinteger"] for b in bits], dtype=np.uint64),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore a batch saved by :meth:`state_dict` (directly or through a checkpoint)."""
        arrays = {k: np.asarray(v) for k, v in state.items()}
        states = arrays["state"]
        if states.ndim != 2 or states.shape[0] != self.n or arrays["done"].shape != (self.n,):
            raise ValueError(f"saved batch does not hold {self.n} copies (state shape {states.shape})")
        generators = []
        for i in range(self.n):
            g = np.random.Generator(np.random.PCG64())
            g.bit_generator.state = {
                "bit_generator": "PCG64",
                "state": {"state": _join(arrays["pcg64_state"][i]), "inc": _join(arrays["pcg64_inc"][i])},
                "has_uint32": int(arrays["has_uint32"][i]),
                "uinteger": int(arrays["uinteger"][i]),
            }
            generators.append(g)
        self.generators[:] = generators
        self.state = states.astype(np.float64, copy=True)
        self.elapsed = arrays["elapsed"].astype(np.int64, copy=True)
        self.done = arrays["done"].astype(bool, copy=True)


def _split(values: list[int]) -> np.ndarray:
    """128-bit integers as ``(N, 2)`` uint64 ``[high, low]``."""
    return np.array([[v >> 64, v & _UINT64] for v in values], dtype=np.uint64).reshape(-1, 2)


def _join(pair: np.ndarray) -> int:
    return (int(pair[0]) << 64) | int(pair[1])
