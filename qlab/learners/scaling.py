"""Per-dimension scaling of observations before they enter a network.

A dimension with finite ``low`` and ``high`` in the observation ``Box`` is mapped affinely onto
[-1, 1] (``low -> -1``, ``high -> 1``; a dimension with ``low == high`` maps to 0). Every other
dimension is standardised, ``(x - mean) / sqrt(var + VARIANCE_FLOOR)``, with the running mean and
population variance of the observations given to :meth:`InputScaler.update`; before any update
it passes through unchanged. With ``standardise=False`` the unbounded dimensions always pass
through unchanged and no moments are kept. The running moments are combined batch by batch with the pairwise
rule of Chan, Golub & LeVeque (1979), so a stream fed in batches of any sizes gives the moments
of the whole stream (up to rounding), vectorised over rows and dimensions.
"""

from __future__ import annotations

from typing import Any

import numpy as np

#: added to the running variance before the square root: a dimension seen constant so far maps to 0
VARIANCE_FLOOR = 1e-8


class InputScaler:
    """Affine map of bounded dimensions onto [-1, 1]; running standardisation of the others if ``standardise``."""

    def __init__(self, low: np.ndarray, high: np.ndarray, standardise: bool = True):
        low = np.asarray(low, dtype=np.float64).reshape(-1)
        high = np.asarray(high, dtype=np.float64).reshape(-1)
        if low.shape != high.shape or np.any(low > high):
            raise ValueError(f"low and high must be bounds of the same shape with low <= high, got {low}, {high}")
        self.bounded = np.isfinite(low) & np.isfinite(high)
        self.standardise = bool(standardise)
        low, high = np.where(self.bounded, low, -1.0), np.where(self.bounded, high, 1.0)  # unbounded: identity
        self.center = 0.5 * (low + high)
        width = 0.5 * (high - low)
        self.half_width = np.where(width > 0, width, 1.0)
        self.count = 0
        self.mean = np.zeros(low.shape)
        self.m2 = np.zeros(low.shape)  # sum of squared deviations from the mean

    @property
    def variance(self) -> np.ndarray:
        """Population variance of the observations seen (``numpy.var`` with ``ddof=0``); ones before any."""
        return self.m2 / self.count if self.count else np.ones_like(self.m2)

    def update(self, obs: np.ndarray) -> None:
        """Fold a batch of observations ``(B, obs_dim)`` into the running mean and variance."""
        x = np.asarray(obs, dtype=np.float64).reshape(-1, self.mean.size)
        n_batch = x.shape[0]
        if n_batch == 0 or not self.standardise:
            return
        batch_mean = x.mean(axis=0)
        batch_m2 = np.square(x - batch_mean).sum(axis=0)
        total = self.count + n_batch
        delta = batch_mean - self.mean
        self.mean = self.mean + delta * (n_batch / total)
        self.m2 = self.m2 + batch_m2 + np.square(delta) * (self.count * n_batch / total)
        self.count = total

    def transform(self, obs: np.ndarray) -> np.ndarray:
        """Network inputs ``(B, obs_dim)`` float32 for observations ``(B, obs_dim)``."""
        x = np.asarray(obs, dtype=np.float64).reshape(-1, self.mean.size)
        if self.count:
            spread = np.sqrt(self.variance + VARIANCE_FLOOR)
            offset = np.where(self.bounded, self.center, self.mean)
            scale = np.where(self.bounded, self.half_width, spread)
        else:
            offset, scale = self.center, self.half_width
        return ((x - offset) / scale).astype(np.float32)

    def state_dict(self) -> dict[str, Any]:
        """The running moments (count, mean, sum of squared deviations)."""
        return {"count": self.count, "mean": self.mean.copy(), "m2": self.m2.copy()}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore moments saved by :meth:`state_dict` for the same number of dimensions."""
        mean = np.asarray(state["mean"], dtype=np.float64)
        if mean.shape != self.mean.shape:
            raise ValueError(f"scaler statistics have shape {mean.shape}, this scaler has {self.mean.shape}")
        self.count = int(state["count"])
        self.mean = mean.copy()
        self.m2 = np.asarray(state["m2"], dtype=np.float64).copy()
