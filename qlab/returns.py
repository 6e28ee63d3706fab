"""Discounted returns of reward sequences, vectorised over episodes."""

from __future__ import annotations

import numpy as np

from qlab.validation import require_gamma


def discounted_return(rewards: np.ndarray, gamma: float, lengths: np.ndarray | None = None) -> np.ndarray:
    """Sum_t gamma**t * r[t] for each row of ``rewards``.

    ``rewards`` has shape ``(T,)`` (one episode, returns a scalar array) or ``(N, T)``;
    ``lengths`` (shape ``(N,)``) marks where each padded row ends.
    """
    require_gamma(gamma)
    r = np.asarray(rewards, dtype=np.float64)
    weights = gamma ** np.arange(r.shape[-1], dtype=np.float64)
    if lengths is not None:
        mask = np.arange(r.shape[-1]) < np.asarray(lengths)[..., None]
        r = np.where(mask, r, 0.0)
    return r @ weights


def returns_to_go(rewards: np.ndarray, gamma: float) -> np.ndarray:
    """G[t] = sum_{k>=t} gamma**(k-t) * r[k] along the last axis (discounted reward-to-go)."""
    r = np.asarray(rewards, dtype=np.float64)
    t = r.shape[-1]
    power = np.arange(t)[None, :] - np.arange(t)[:, None]  # k - t
    kernel = np.where(power >= 0, gamma ** np.maximum(power, 0), 0.0)
    return r @ kernel.T
