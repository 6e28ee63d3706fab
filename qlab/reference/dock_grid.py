"""A finite grid model of Dock: interpolated transitions on a (position, velocity) grid.

Every grid node is stepped once per thrust level through the task's own ``batch_step`` (all
nodes at once); the continuous next state is shared among the four surrounding nodes with
bilinear weights (Munos & Moore 2002, "Variable resolution discretization in optimal control").
A step that ends the episode goes to one of two absorbing nodes, ``success`` or ``failure``,
which pay nothing afterwards. The result is a finite MDP: per-action sparse ``(S, S)`` transition
matrices and ``(S, A)`` rewards for each shaping variant, ready for
:func:`qlab.reference.value_iteration`.

Large grids can be cached on disk (numpy's ``.npz`` format, no pickle) under ``$QLAB_CACHE`` or
``.cache/qlab/`` in the repository root, keyed by a hash of the task parameters and the grid size.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from qlab.shaping import check_variant, shaping_bonus
from qlab.tasks.dock import Dock
from qlab.validation import require_gamma, require_int

#: Bump when the grid construction changes, so stale cache files are not reused.
GRID_FORMAT_VERSION = 1


def default_cache_dir() -> Path:
    """``$QLAB_CACHE`` if set, else ``.cache/qlab`` in the repository root (home directory if not in a checkout)."""
    env = os.environ.get("QLAB_CACHE")
    if env:
        return Path(env)
    repo_root = Path(__file__).resolve().parents[2]
    base = repo_root if (repo_root / "pyproject.toml").exists() else Path.home()
    return base / ".cache" / "qlab"


class DockGrid:
    """Finite-MDP model of a :class:`~qlab.tasks.dock.Dock` task on a uniform grid.

    States ``0 .. n_grid - 1`` are the grid nodes (``nodes[k] = (position_m, velocity_m_s)``,
    ``k = i_position * n_velocity + i_velocity``) spanning the task's state bounds;
    ``success_index = n_grid`` and ``failure_index = n_grid + 1`` are the absorbing terminal
    nodes, so ``n_states = n_grid + 2``. Actions are the task's discrete thrust levels.

    ``cache``: ``False`` (build in memory), ``True`` (the default cache folder) or a folder path.
    The model needs a discrete, noise-free task without dead time (``velocity_noise_m_s = 0``,
    ``dead_time_steps = 0``: the grid has no axes for pending commands).
    """

    def __init__(self, task: Dock, n_position: int, n_velocity: int, cache: bool | str | os.PathLike = False):
        if not isinstance(task, Dock):
            raise ValueError(f"task must be a Dock, got {type(task).__name__}")
        if task.control_levels is None:
            raise ValueError("task must use action_kind='discrete' for a grid model")
        if task.velocity_noise_m_s != 0:
            raise ValueError("DockGrid models the noise-free task: velocity_noise_m_s must be 0")
        if task.dead_time_steps:
            raise ValueError("DockGrid models the task without dead time: dead_time_steps must be 0")
        self.task = task
        self.n_position = require_int("n_position", n_position, 2)
        self.n_velocity = require_int("n_velocity", n_velocity, 2)
        self.positions_m = np.linspace(task.state_low[0], task.state_high[0], self.n_position)
        self.velocities_m_s = np.linspace(task.state_low[1], task.state_high[1], self.n_velocity)
        grid_x, grid_v = np.meshgrid(self.positions_m, self.velocities_m_s, indexing="ij")
        self.nodes = np.stack([grid_x.ravel(), grid_v.ravel()], axis=1)
        self.n_grid = self.nodes.shape[0]
        self.success_index = self.n_grid
        self.failure_index = self.n_grid + 1
        self.n_states = self.n_grid + 2
        self.n_actions = int(task.control_levels.shape[0])
        self.cache_path = None if cache is False else self._cache_file(default_cache_dir() if cache is True else cache)
        self.loaded_from_cache = self.cache_path is not None and self._load(self.cache_path)
        if not self.loaded_from_cache:
            self._build()
            if self.cache_path is not None:
                self._save(self.cache_path)

    # --- interpolation --------------------------------------------------------------------

    def node_index(self, i_position: np.ndarray | int, i_velocity: np.ndarray | int) -> np.ndarray:
        """State index of the grid node at position index ``i_position`` and velocity index ``i_velocity``."""
        return np.asarray(i_position) * self.n_velocity + np.asarray(i_velocity)

    def interpolation_matrix(self, states: np.ndarray) -> sp.csr_array:
        """Bilinear weights ``(N, n_states)`` of each state on the grid nodes; rows sum to 1.

        States outside the grid are clipped to its edges first. The absorbing columns are zero.
        """
        s = np.clip(np.asarray(states, dtype=np.float64).reshape(-1, 2), self.nodes[0], self.nodes[-1])
        i, tx = _cell(s[:, 0], self.positions_m)
        j, tv = _cell(s[:, 1], self.velocities_m_s)
        corner = self.node_index(i, j)
        cols = np.stack([corner, corner + 1, corner + self.n_velocity, corner + self.n_velocity + 1], axis=1)
        weights = np.stack([(1 - tx) * (1 - tv), (1 - tx) * tv, tx * (1 - tv), tx * tv], axis=1)
        rows = np.repeat(np.arange(s.shape[0]), 4)
        matrix = sp.csr_array((weights.ravel(), (rows, cols.ravel())), shape=(s.shape[0], self.n_states))
        matrix.eliminate_zeros()
        return matrix

    def interpolate(self, values: np.ndarray, states: np.ndarray) -> np.ndarray:
        """Grid values ``(n_states,)`` or ``(n_states, A)`` evaluated at arbitrary states ``(N, 2)``."""
        values = np.asarray(values, dtype=np.float64)
        if values.shape[0] != self.n_states:
            raise ValueError(f"values must have n_states = {self.n_states} rows, got shape {values.shape}")
        return self.interpolation_matrix(states) @ values

    def start_weights(self, n_samples: int = 1024) -> np.ndarray:
        """Start-state distribution on the nodes, ``(n_states,)`` summing to 1.

        The uniform start distance is represented by ``n_samples`` equal slices (midpoint rule),
        each spread on the grid with the bilinear weights, so ``start_weights() @ V`` is the
        expected interpolated value at the start.
        """
        n_samples = require_int("n_samples", n_samples, 1)
        lo, hi = self.task.start_distance_m
        starts = np.zeros((n_samples, 2))
        starts[:, 0] = -(lo + (np.arange(n_samples) + 0.5) / n_samples * (hi - lo))
        return np.asarray(self.interpolation_matrix(starts).mean(axis=0)).ravel()

    # --- rewards --------------------------------------------------------------------------

    def potentials(self) -> np.ndarray:
        """Phi at every state, ``(n_states,)``: the task's potential at the nodes, 0 at the absorbing nodes."""
        phi = np.zeros(self.n_states)
        phi[: self.n_grid] = self.task.potential(self.task.observe(self.nodes))
        return phi

    def rewards(self, variant: str, gamma: float, progress_scale: float | None = None) -> np.ndarray:
        """Rewards ``(n_states, A)`` of a shaping variant; zero at the absorbing nodes.

        ``none``: the task's own reward. ``potential``: R + gamma * E[Phi(next node)] - Phi(node)
        with Phi = 0 at the absorbing nodes, so the grid MDP keeps Q*_shaped = Q* - Phi exactly;
        ``potential_ahead`` is the same (nothing is pending without dead time).
        ``progress``: R + k * max(0, d(s) - d(s')) for the continuous next state s', the bonus the
        task pays (``k = progress_scale``, default the task's ``default_progress_scale``).
        """
        check_variant(variant, self.task.shaping_variants)
        gamma = require_gamma(gamma)
        if variant == "none":
            return self.base_reward.copy()
        if variant == "progress":
            k = self.task.default_progress_scale if progress_scale is None else float(progress_scale)
            return self.base_reward + k * self.progress_m
        phi = self.potentials()
        expected_next = np.stack([P @ phi for P in self.transitions], axis=1)
        return self.base_reward + gamma * expected_next - phi[:, None]

    # --- construction and cache -----------------------------------------------------------

    def _build(self) -> None:
        task, S, A, G = self.task, self.n_states, self.n_actions, self.n_grid
        states = np.tile(self.nodes, (A, 1))  # block a holds every node under action a
        controls = np.repeat(task.control_levels, G, axis=0)
        out = task.batch_step(states, controls, np.random.default_rng(0))
        live = ~out.terminated
        weights = self.interpolation_matrix(out.next_state[live]).tocoo()
        rows_live = np.flatnonzero(live)[weights.row]
        end_rows = np.flatnonzero(out.terminated)
        end_cols = np.where(out.success[end_rows], self.success_index, self.failure_index)
        absorbing = np.array([self.success_index, self.failure_index])
        rows = np.concatenate([rows_live, end_rows])  # row index within the (A * G) stacked blocks
        cols = np.concatenate([weights.col, end_cols])
        data = np.concatenate([weights.data, np.ones(end_rows.size)])
        action = rows // G
        self.transitions = []
        for a in range(A):
            mask = action == a
            r = np.concatenate([rows[mask] - a * G, absorbing])
            c = np.concatenate([cols[mask], absorbing])
            d = np.concatenate([data[mask], np.ones(2)])
            self.transitions.append(sp.csr_array((d, (r, c)), shape=(S, S)))
        self.base_reward = np.zeros((S, A))
        self.base_reward[:G] = out.base_reward.reshape(A, G).T
        progress = shaping_bonus(
            "progress", task, task.observe(states), task.observe(out.next_state), out.terminated, 1.0, 1.0
        )
        self.progress_m = np.zeros((S, A))
        self.progress_m[:G] = progress.reshape(A, G).T

    def _cache_key(self) -> str:
        description = {
            "format": GRID_FORMAT_VERSION,
            "task": type(self.task).__name__,
            "params": self.task.params,
            "n_position": self.n_position,
            "n_velocity": self.n_velocity,
        }
        return hashlib.sha256(json.dumps(description, sort_keys=True).encode()).hexdigest()

    def _cache_file(self, folder: str | os.PathLike) -> Path:
        return Path(folder) / f"dock_grid_{self._cache_key()[:20]}.npz"

    def _save(self, path: Path) -> None:
        """Write the model atomically (temporary file, then rename) as an uncompressed ``.npz``."""
        arrays: dict[str, np.ndarray] = {
            "key": np.array(self._cache_key()),
            "base_reward": self.base_reward,
            "progress_m": self.progress_m,
        }
        for a, P in enumerate(self.transitions):
            arrays[f"P{a}_data"], arrays[f"P{a}_indices"], arrays[f"P{a}_indptr"] = P.data, P.indices, P.indptr
        path.parent.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=path.parent, suffix=".tmp", delete=False) as handle:
            np.savez(handle, **arrays)
        os.replace(handle.name, path)

    def _load(self, path: Path) -> bool:
        """Fill the model from ``path`` if it holds this exact grid; return whether it did."""
        if not path.exists():
            return False
        with np.load(path, allow_pickle=False) as stored:
            if str(stored["key"]) != self._cache_key():
                return False
            S = self.n_states
            self.base_reward = stored["base_reward"]
            self.progress_m = stored["progress_m"]
            self.transitions = [
                sp.csr_array((stored[f"P{a}_data"], stored[f"P{a}_indices"], stored[f"P{a}_indptr"]), shape=(S, S))
                for a in range(self.n_actions)
            ]
        return True


def _cell(values: np.ndarray, axis: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index of the grid cell holding each value on a uniform ``axis`` and the fraction across it."""
    position = (values - axis[0]) / (axis[1] - axis[0])
    index = np.clip(np.floor(position), 0, axis.size - 2).astype(np.int64)
    return index, np.clip(position - index, 0.0, 1.0)
