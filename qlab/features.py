"""State encodings for the tabular and linear learners, vectorised over a batch of observations.

Every encoding is a :class:`FeatureMap`: ``n_features`` and ``phi = fmap(obs)`` with ``obs`` of
shape ``(B, d)`` and ``phi`` of shape ``(B, n_features)`` (dense, float64). Each map also gives
its features as *sparse rows*, ``idx, val = fmap.rows(obs)``, both ``(B, k)``: row ``b`` is
non-zero only at columns ``idx[b]`` with values ``val[b]``. Binary maps (grid bins, tile coding)
have small ``k`` (1, or the number of tilings), so learners touch only the active weights.

* :class:`GridBins`: one cell of a uniform grid per observation (one-hot features).
* :class:`TileCoder`: several offset grids (tilings); one active tile per tiling.
* :class:`GaussianRBF`: Gaussian bumps centred on a grid.
* :class:`QuadraticFeatures`: the monomials ``z_i z_j`` (``i <= j``), ``z_i`` and 1 of a vector
  ``z`` (for LQ: ``z = [x; u]``), with the map between the weights and a symmetric matrix.

Bounds of the gridded maps come from the observation space unless ``low``/``high`` are given;
observations outside the bounds are clipped to them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from gymnasium import spaces

from qlab.validation import require_choice, require_int, require_int_list, require_positive

FEATURE_KINDS = ("grid", "tiles", "rbf", "quadratic")
TILE_OFFSETS = ("uniform", "asymmetric")
#: What the ``bins`` setting may hold besides its integers.
BINS_NOTE = "(one, or one per dimension)"


@dataclass
class FeatureConfig:
    """Which state encoding a linear learner uses, and its parameters."""

    features: str = "tiles"  # "grid" | "tiles" | "rbf" | "quadratic"
    bins: list[int] = field(default_factory=lambda: [8])  # cells, tiles or RBF centres per dimension (one for all)
    n_tilings: int = 8
    tile_offsets: str = "asymmetric"  # "uniform" | "asymmetric" (Sutton & Barto 2018, sec. 9.5.4)
    rbf_width: float = 1.0  # RBF standard deviation in units of the centre spacing
    low: list[float] = field(default_factory=list)  # lower bounds per dimension; empty: the observation space's
    high: list[float] = field(default_factory=list)  # upper bounds per dimension; empty: the observation space's

    def __post_init__(self) -> None:
        require_choice("features", self.features, FEATURE_KINDS)
        require_choice("tile_offsets", self.tile_offsets, TILE_OFFSETS)
        require_int("n_tilings", self.n_tilings, 1)
        require_positive("rbf_width", self.rbf_width)
        require_int_list("bins", self.bins, 1, BINS_NOTE)


def per_dim(name: str, values: list[float], dim: int) -> np.ndarray:
    """A list of one value (for all dimensions) or of ``dim`` values as a float array ``(dim,)``."""
    arr = np.asarray(values, dtype=np.float64).reshape(-1)
    if arr.size == 1:
        arr = np.full(dim, arr[0])
    if arr.shape != (dim,):
        raise ValueError(
            f"{name} must hold one value (for every dimension) or one per observation dimension ({dim}), "
            f"got {list(values)!r}"
        )
    return arr


def level_bins(bins: list[int], levels: list[int]) -> list[int]:
    """``bins`` with one cell, tile or RBF centre per level on the dimensions that take few values.

    ``levels[k]`` is how many evenly spaced values observation dimension ``k`` takes between its
    bounds (0: continuous; e.g. a pending command of discrete actions takes ``n_levels``). One
    value of ``bins`` for every dimension becomes that value on the continuous dimensions and
    ``levels[k]`` on the others; a per-dimension list, or no dimension with levels, stays as given.
    With ``n`` cells across ``n`` levels, level ``i`` lies ``i * n / (n - 1)`` cells from the lower
    bound: in cell ``i`` (the last one on the upper edge), and consecutive levels lie more than a
    tile apart, so each level has a tile of its own in every tiling; RBF centres fall on the levels.
    """
    bins = require_int_list("bins", bins, 1, BINS_NOTE)
    if len(bins) > 1 or not any(levels):
        return bins
    return [int(n) if n else bins[0] for n in levels]


def observation_dim(space: spaces.Space) -> int:
    """Length of a flat ``Box`` observation, else ``ValueError``."""
    if not isinstance(space, spaces.Box) or len(space.shape) != 1:
        raise ValueError(f"observation space must be a 1-D gymnasium Box, got {space!r}")
    return int(space.shape[0])


def resolve_bounds(space: spaces.Space, low: list[float], high: list[float]) -> tuple[np.ndarray, np.ndarray]:
    """Feature bounds: ``low``/``high`` if given (non-empty), else the observation space's; must be finite."""
    dim = observation_dim(space)
    lo = per_dim("low", low, dim) if len(low) else np.asarray(space.low, dtype=np.float64)
    hi = per_dim("high", high, dim) if len(high) else np.asarray(space.high, dtype=np.float64)
    bad = np.flatnonzero(~(np.isfinite(lo) & np.isfinite(hi)))
    if bad.size:
        raise ValueError(
            f"feature bounds must be finite, but low/high are infinite in observation dimensions {bad.tolist()}: "
            "set the 'low' and 'high' settings"
        )
    if np.any(hi <= lo):
        raise ValueError(f"high must exceed low in every dimension, got low={lo.tolist()}, high={hi.tolist()}")
    return lo, hi


def as_batch(obs: np.ndarray, dim: int) -> np.ndarray:
    """``obs`` as a float64 array ``(B, dim)``, else ``ValueError``."""
    x = np.asarray(obs, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != dim:
        raise ValueError(f"observations must have shape (B, {dim}), got {x.shape}")
    return x


def c_order_strides(shape: np.ndarray) -> np.ndarray:
    """Element strides of a C-order array of ``shape``: flat index = coords @ strides."""
    return np.concatenate([np.cumprod(shape[::-1])[::-1][1:], [1]]).astype(np.int64)


class FeatureMap:
    """Common interface: ``n_features``, dense ``__call__`` and sparse ``rows`` (subclasses define one of the two)."""

    n_features: int
    dim: int
    #: every non-zero feature value is 1 (grid cells, tiles): Q is then a sum of weights of ``rows(obs)[0]``
    binary: bool = False

    def __call__(self, obs: np.ndarray) -> np.ndarray:
        """Dense features ``(B, n_features)``."""
        idx, val = self.rows(obs)
        out = np.zeros((idx.shape[0], self.n_features))
        np.put_along_axis(out, idx, val, axis=1)
        return out

    def rows(self, obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Sparse rows ``(idx, val)``, both ``(B, k)``: distinct columns of each row (all its non-zeros), values."""
        phi = self(obs)
        return np.broadcast_to(np.arange(self.n_features), phi.shape), phi

    def sparse(self, obs: np.ndarray) -> sp.csr_array:
        """Features as a ``scipy.sparse`` CSR array ``(B, n_features)``."""
        return rows_to_csr(*self.rows(obs), self.n_features)

    def _set_box(self, low: np.ndarray, high: np.ndarray, bins: list[int]) -> np.ndarray:
        """Store the box ``[low, high]`` and its dimension; return the checked per-dimension ``bins``."""
        self.low = np.asarray(low, dtype=np.float64)
        self.high = np.asarray(high, dtype=np.float64)
        self.dim = self.low.size
        return per_dim("bins", require_int_list("bins", bins, 1, BINS_NOTE), self.dim).astype(np.int64)


def rows_to_csr(idx: np.ndarray, val: np.ndarray, n_cols: int) -> sp.csr_array:
    """Sparse rows ``(idx, val)``, both ``(B, k)``, as a CSR array ``(B, n_cols)``."""
    b, k = idx.shape
    indptr = np.arange(0, b * k + 1, k)
    return sp.csr_array((np.ravel(val), np.ravel(idx), indptr), shape=(b, n_cols))


class GridBins(FeatureMap):
    """A uniform grid of ``bins[k]`` cells along dimension ``k`` between ``low`` and ``high``."""

    binary = True

    def __init__(self, low: np.ndarray, high: np.ndarray, bins: list[int]):
        self.bins = self._set_box(low, high, bins)
        self.width = (self.high - self.low) / self.bins
        self._strides = c_order_strides(self.bins)
        self.n_features = int(np.prod(self.bins))

    def index(self, obs: np.ndarray) -> np.ndarray:
        """Flat (C-order) cell index of each observation, ``(B,)`` int64; outside points go to edge cells."""
        x = as_batch(obs, self.dim)
        cell = np.minimum(np.maximum(np.floor((x - self.low) / self.width), 0), self.bins - 1).astype(np.int64)
        return cell @ self._strides

    def rows(self, obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        idx = self.index(obs)[:, None]
        return idx, np.ones(idx.shape)


class TileCoder(FeatureMap):
    """``n_tilings`` grids of ``bins[k] + 1`` tiles along dimension ``k``, each offset by a fraction of a tile.

    Tile width ``w_k = (high_k - low_k) / bins_k``. Tiling ``j`` is displaced by ``j / n_tilings``
    of a tile width along every dimension (``uniform``) or by ``j * (2k - 1) / n_tilings`` along
    dimension ``k = 1..d``, modulo one tile (``asymmetric``: the displacement vector of odd
    integers recommended by Sutton & Barto 2018, sec. 9.5.4). The extra tile per dimension
    covers the displaced range. No hashing: feature ``j * T + t`` is tile ``t`` of tiling ``j``
    with ``T = prod(bins + 1)`` tiles per tiling.
    """

    binary = True

    def __init__(self, low: np.ndarray, high: np.ndarray, bins: list[int], n_tilings: int, offsets: str = "asymmetric"):
        require_choice("tile_offsets", offsets, TILE_OFFSETS)
        self.n_tilings = require_int("n_tilings", n_tilings, 1)
        self.bins = self._set_box(low, high, bins)
        self.width = (self.high - self.low) / self.bins
        step = np.ones(self.dim) if offsets == "uniform" else 2.0 * np.arange(1, self.dim + 1) - 1.0
        #: (n_tilings, d) displacement of each tiling in tile widths, in [0, 1)
        self.offsets = np.mod(np.arange(self.n_tilings)[:, None] * step[None, :] / self.n_tilings, 1.0)
        self.tiles_per_tiling = int(np.prod(self.bins + 1))
        self._strides = c_order_strides(self.bins + 1)
        self.n_features = self.n_tilings * self.tiles_per_tiling

    def active(self, obs: np.ndarray) -> np.ndarray:
        """Index of the active tile in every tiling, ``(B, n_tilings)`` int64."""
        u = np.clip((as_batch(obs, self.dim) - self.low) / self.width, 0.0, self.bins)  # (B, d) in tile widths
        coords = np.floor(u[:, None, :] + self.offsets[None, :, :]).astype(np.int64)  # (B, n, d)
        local = coords @ self._strides
        return local + np.arange(self.n_tilings) * self.tiles_per_tiling

    def rows(self, obs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        idx = self.active(obs)
        return idx, np.ones(idx.shape)


class GaussianRBF(FeatureMap):
    """Gaussian bumps ``exp(-sum_k (x_k - c_k)^2 / (2 sigma_k^2))`` centred on a ``bins``-per-dimension grid.

    Centres span ``[low, high]`` evenly (a single centre sits mid-range); ``sigma_k`` is
    ``width`` times the centre spacing along dimension ``k`` (the full range for one centre).
    """

    def __init__(self, low: np.ndarray, high: np.ndarray, bins: list[int], width: float = 1.0):
        width = require_positive("rbf_width", width)
        counts = self._set_box(low, high, bins)
        axes = [
            np.linspace(lo, hi, n) if n > 1 else np.array([0.5 * (lo + hi)])
            for lo, hi, n in zip(self.low, self.high, counts, strict=True)
        ]
        self.centres = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, self.dim)
        spacing = (self.high - self.low) / np.maximum(counts - 1, 1)
        self.sigma = width * spacing
        self.n_features = self.centres.shape[0]

    def __call__(self, obs: np.ndarray) -> np.ndarray:
        x = np.clip(as_batch(obs, self.dim), self.low, self.high)
        scaled = (x[:, None, :] - self.centres[None, :, :]) / self.sigma
        return np.exp(-0.5 * np.einsum("bnk,bnk->bn", scaled, scaled))


class QuadraticFeatures(FeatureMap):
    """``phi(z) = [z_i z_j for i <= j (row-major upper triangle); z_1..z_d; 1]`` of ``z`` in R^d.

    With weights ``w``, ``w . phi(z) = z' H z + g' z + c`` where ``(H, g, c) = to_matrix(w)``
    and ``H`` is symmetric: ``H_ii = w_ii``, ``H_ij = H_ji = w_ij / 2`` for ``i < j``.
    """

    def __init__(self, dim: int):
        self.dim = require_int("dim", dim, 1)
        self._rows, self._cols = np.triu_indices(self.dim)
        self.n_quadratic = self._rows.size
        self.n_features = self.n_quadratic + self.dim + 1

    def __call__(self, obs: np.ndarray) -> np.ndarray:
        z = as_batch(obs, self.dim)
        return np.hstack([z[:, self._rows] * z[:, self._cols], z, np.ones((z.shape[0], 1))])

    def to_matrix(self, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """Symmetric ``H`` (d, d), linear ``g`` (d,) and constant ``c`` with ``w . phi(z) = z'Hz + g'z + c``."""
        w = np.asarray(weights, dtype=np.float64)
        if w.shape != (self.n_features,):
            raise ValueError(f"weights must have shape ({self.n_features},), got {w.shape}")
        quad = w[: self.n_quadratic]
        H = np.zeros((self.dim, self.dim))
        off = self._rows != self._cols
        H[self._rows, self._cols] = np.where(off, 0.5 * quad, quad)
        H[self._cols, self._rows] = H[self._rows, self._cols]
        return H, w[self.n_quadratic : -1].copy(), float(w[-1])

    def from_matrix(self, H: np.ndarray, g: np.ndarray | None = None, c: float = 0.0) -> np.ndarray:
        """Weights ``w`` with ``w . phi(z) = z'Hz + g'z + c`` (``H`` is symmetrised first)."""
        H = np.asarray(H, dtype=np.float64)
        if H.shape != (self.dim, self.dim):
            raise ValueError(f"H must have shape ({self.dim}, {self.dim}), got {H.shape}")
        sym = 0.5 * (H + H.T)
        quad = np.where(self._rows != self._cols, 2.0, 1.0) * sym[self._rows, self._cols]
        lin = np.zeros(self.dim) if g is None else np.asarray(g, dtype=np.float64).reshape(self.dim)
        return np.concatenate([quad, lin, [float(c)]])


def build_features(config: FeatureConfig, space: spaces.Space) -> FeatureMap:
    """The state feature map named by ``config.features`` for observations of ``space``."""
    dim = observation_dim(space)
    if require_choice("features", config.features, FEATURE_KINDS) == "quadratic":
        return QuadraticFeatures(dim)
    low, high = resolve_bounds(space, config.low, config.high)
    if config.features == "grid":
        return GridBins(low, high, config.bins)
    if config.features == "tiles":
        return TileCoder(low, high, config.bins, config.n_tilings, config.tile_offsets)
    return GaussianRBF(low, high, config.bins, config.rbf_width)


def feature_count(config: FeatureConfig, space: spaces.Space) -> tuple[int, str]:
    """How many features ``build_features(config, space)`` would make, and the settings that decide it.

    Computed from the settings alone, before anything is allocated (exact Python integers, so
    sizes beyond any machine are reported, not overflowed).
    """
    dim = observation_dim(space)
    if config.features == "quadratic":
        return dim * (dim + 1) // 2 + dim + 1, "features=quadratic"
    bins = [int(b) for b in per_dim("bins", require_int_list("bins", config.bins, 1, BINS_NOTE), dim)]
    if config.features == "tiles":
        return int(config.n_tilings) * math.prod(b + 1 for b in bins), "bins, n_tilings"
    return math.prod(bins), "bins"
