"""Exact answers for finite MDPs: value iteration, policy evaluation, greedy policies.

Conventions: ``P[a]`` is the ``(S, S)`` transition matrix of action ``a`` (row ``s`` holds the
probabilities of the next state ``s'``), given as a dense ``(A, S, S)`` array or as a sequence of
``A`` ``scipy.sparse`` matrices; ``R[s, a]`` is the expected immediate reward. A terminal state is
absorbing: ``P[a][s, s] = 1`` under every action, with ``R[s, :] = 0``.

:class:`TransitionModel` checks ``P`` once and stacks it into one ``(A*S, S)`` operator, so that
every Bellman backup is a single (sparse) matrix-vector product. The public functions accept
either raw ``P`` or a model, so repeated calls on a large MDP skip the checks.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import breadth_first_order
from scipy.sparse.linalg import spsolve

from qlab.validation import require_gamma, require_int, require_positive

ROW_SUM_ATOL = 1e-8
"""How far a row of ``P[a]`` or of a policy may sum away from 1."""

DEFAULT_MAX_ITER = 100_000

_FLOAT_NOISE_ULPS = 16.0
"""Sweep changes below this many rounding units of max|V| count as converged (float64 resolution)."""


@dataclass(frozen=True)
class TransitionModel:
    """Validated transition probabilities stacked into one ``(A*S, S)`` operator.

    Row ``a*S + s`` of ``stacked`` is ``P[a][s, :]``. ``absorbing[s]`` is True when ``s`` stays
    put under every action.
    """

    stacked: np.ndarray | sp.csr_array
    n_actions: int
    n_states: int
    absorbing: np.ndarray

    @classmethod
    def build(cls, P: np.ndarray | Sequence[sp.sparray | sp.spmatrix] | TransitionModel) -> TransitionModel:
        """Check ``P`` (shape, non-negative, rows summing to 1) and stack it; a model passes through as is."""
        if isinstance(P, TransitionModel):
            return P
        if not isinstance(P, np.ndarray) and isinstance(P, Sequence) and any(sp.issparse(m) for m in P):
            return cls._build_sparse(P)
        return cls._build_dense(P)

    @classmethod
    def _build_dense(cls, P: np.ndarray) -> TransitionModel:
        try:
            dense = np.asarray(P, dtype=np.float64)
        except (TypeError, ValueError) as err:
            raise ValueError(
                "P must be a dense (A, S, S) array or a sequence of A scipy.sparse (S, S) matrices"
            ) from err
        if dense.ndim != 3 or dense.shape[0] < 1 or dense.shape[1] < 1 or dense.shape[1] != dense.shape[2]:
            raise ValueError(f"P must have shape (A, S, S) with A, S >= 1, got shape {dense.shape}")
        n_actions, n_states, _ = dense.shape
        if not np.all(np.isfinite(dense)) or dense.min() < 0.0:
            raise ValueError("P must hold finite, non-negative probabilities")
        _check_row_sums("P", dense.sum(axis=2))
        self_loop = np.diagonal(dense, axis1=1, axis2=2)  # (A, S)
        return cls(
            stacked=dense.reshape(n_actions * n_states, n_states),
            n_actions=n_actions,
            n_states=n_states,
            absorbing=np.all(self_loop >= 1.0 - ROW_SUM_ATOL, axis=0),
        )

    @classmethod
    def _build_sparse(cls, P: Sequence[sp.sparray | sp.spmatrix]) -> TransitionModel:
        if not all(sp.issparse(m) for m in P):
            raise ValueError("P mixes sparse and dense entries: give all A matrices as scipy.sparse or one dense array")
        mats = [sp.csr_array(m, dtype=np.float64) for m in P]
        n_states = mats[0].shape[0]
        if n_states < 1 or any(m.shape != (n_states, n_states) for m in mats):
            raise ValueError(f"every P[a] must have shape (S, S) with S >= 1, got {[m.shape for m in mats]}")
        for a, m in enumerate(mats):
            if not np.all(np.isfinite(m.data)) or (m.nnz and m.data.min() < 0.0):
                raise ValueError(f"P[{a}] must hold finite, non-negative probabilities")
        stacked = _stack_rows(mats)
        _check_row_sums("P", (stacked @ np.ones(n_states)).reshape(len(mats), n_states))
        self_loop = np.stack([m.diagonal() for m in mats])
        return cls(
            stacked=stacked,
            n_actions=len(mats),
            n_states=n_states,
            absorbing=np.all(self_loop >= 1.0 - ROW_SUM_ATOL, axis=0),
        )

    @property
    def is_sparse(self) -> bool:
        """True when the operator is a ``scipy.sparse`` matrix."""
        return sp.issparse(self.stacked)

    def backup_by_action(self, rewards_by_action: np.ndarray, gamma: float, V: np.ndarray) -> np.ndarray:
        """Q in action-major layout ``(A, S)``: R[s, a] + gamma * E[V(s') | s, a], given R.T (no checks).

        The hot path of value iteration: one matrix-vector product and in-place, contiguous updates.
        """
        q = (self.stacked @ V).reshape(self.n_actions, self.n_states)
        q *= gamma
        q += rewards_by_action
        return q

    def policy_matrix(self, policy: np.ndarray) -> np.ndarray | sp.csr_array:
        """P_pi[s, s'] = sum_a policy[s, a] * P[a][s, s'] (sparse if the model is)."""
        S, A = self.n_states, self.n_actions
        if self.is_sparse:
            mixer = sp.csr_array((policy.T.ravel(), (np.tile(np.arange(S), A), np.arange(A * S))), shape=(S, A * S))
            return (mixer @ self.stacked).tocsr()
        return np.einsum("sa,ast->st", policy, self.stacked.reshape(A, S, S))


def _stack_rows(mats: list[sp.csr_array]) -> sp.csr_array:
    """Stack CSR matrices with equal column counts on top of each other by joining their arrays."""
    nnz_before = np.cumsum([0] + [m.nnz for m in mats[:-1]])
    row_ends = [m.indptr[1:] + n for m, n in zip(mats, nnz_before, strict=True)]
    indptr = np.concatenate([np.zeros(1, dtype=np.int64), *row_ends])
    indices = np.concatenate([m.indices for m in mats])
    data = np.concatenate([m.data for m in mats])
    return sp.csr_array((data, indices, indptr), shape=(sum(m.shape[0] for m in mats), mats[0].shape[1]))


def _check_row_sums(name: str, row_sums: np.ndarray) -> None:
    """Raise ``ValueError`` naming the first row of ``name`` that does not sum to 1."""
    bad = np.argwhere(np.abs(row_sums - 1.0) > ROW_SUM_ATOL)
    if bad.size:
        idx = tuple(int(i) for i in bad[0])
        where = f"{name}[{idx[0]}] row {idx[1]}" if len(idx) == 2 else f"{name} row {idx[0]}"
        raise ValueError(
            f"{where} sums to {row_sums[idx]!r}: every row of {name} must sum to 1 (within {ROW_SUM_ATOL})"
        )


def _check_state_action(name: str, array: np.ndarray, model: TransitionModel) -> np.ndarray:
    values = np.asarray(array, dtype=np.float64)
    expected = (model.n_states, model.n_actions)
    if values.shape != expected:
        raise ValueError(f"{name} must have shape (S, A) = {expected}, got {values.shape}")
    if not np.all(np.isfinite(values)):
        raise ValueError(f"{name} must be finite")
    return values


def _check_policy(policy: np.ndarray, model: TransitionModel) -> np.ndarray:
    pi = _check_state_action("policy", policy, model)
    if pi.min() < 0.0:
        raise ValueError("policy must hold non-negative action probabilities")
    _check_row_sums("policy", pi.sum(axis=1))
    return pi


def bellman_backup(model: TransitionModel, R: np.ndarray, gamma: float, V: np.ndarray) -> np.ndarray:
    """One sweep of the optimality backup, Q[s, a] = R[s, a] + gamma * E[V(s') | s, a] (no checks)."""
    return model.backup_by_action(R.T, gamma, V).T


def value_iteration(
    P: np.ndarray | Sequence[sp.sparray | sp.spmatrix] | TransitionModel,
    R: np.ndarray,
    gamma: float,
    tol: float = 1e-10,
    max_iter: int = DEFAULT_MAX_ITER,
) -> np.ndarray:
    """Optimal action values Q* of shape ``(S, A)`` by value iteration from V = 0.

    Stops when the sup-norm change of V between sweeps falls below ``tol * (1 - gamma) / gamma``
    (then max|V - V*| < tol; Q is backed up once more from that V), or below ``tol`` at
    ``gamma = 1``. Changes below 16 rounding units of max|V| also count as converged: float64
    resolves no finer. ``gamma = 1`` converges for episodic MDPs whose policies all end in an
    absorbing zero-reward state; otherwise, or if ``max_iter`` sweeps are not enough, the last
    iterate is returned with a ``RuntimeWarning``.
    """
    model = TransitionModel.build(P)
    rewards = _check_state_action("R", R, model)
    gamma = require_gamma(gamma)
    require_positive("tol", tol)
    max_iter = require_int("max_iter", max_iter, 1)
    if gamma == 1.0:
        threshold = tol
    elif gamma == 0.0:
        threshold = np.inf
    else:
        threshold = tol * (1.0 - gamma) / gamma
    rewards_by_action = np.ascontiguousarray(rewards.T)
    V = np.zeros(model.n_states)
    change = np.inf
    rounding_unit = _FLOAT_NOISE_ULPS * np.finfo(np.float64).eps
    for _ in range(max_iter):
        V_next = model.backup_by_action(rewards_by_action, gamma, V).max(axis=0)
        change = float(np.max(np.abs(V_next - V)))
        V = V_next
        if change < threshold or change < rounding_unit * float(np.max(np.abs(V))):
            return bellman_backup(model, rewards, gamma, V)
    hint = " (at gamma = 1 every policy must end in an absorbing zero-reward state)" if gamma == 1.0 else ""
    warnings.warn(
        f"value_iteration did not converge in max_iter={max_iter} sweeps: last sup-norm change "
        f"{change:.3g} >= threshold {threshold:.3g}{hint}; returning the last iterate",
        RuntimeWarning,
        stacklevel=2,
    )
    return bellman_backup(model, rewards, gamma, V)


def evaluate_policy(
    P: np.ndarray | Sequence[sp.sparray | sp.spmatrix] | TransitionModel,
    R: np.ndarray,
    gamma: float,
    policy: np.ndarray,
) -> np.ndarray:
    """State values V^pi of shape ``(S,)`` by an exact linear solve of (I - gamma P_pi) V = r_pi.

    ``policy[s, a]`` is the probability of action ``a`` in state ``s``. Absorbing zero-reward
    states are pinned to V = 0 (at ``gamma = 1`` the system is singular there otherwise). At
    ``gamma = 1`` every state must reach such a state under the policy, else ``ValueError``.
    Sparse models use ``scipy.sparse.linalg.spsolve``, dense ones ``numpy.linalg.solve``.
    """
    model = TransitionModel.build(P)
    rewards = _check_state_action("R", R, model)
    gamma = require_gamma(gamma)
    pi = _check_policy(policy, model)
    keep = ~(model.absorbing & np.all(rewards == 0.0, axis=1))  # False on pinned terminal states
    r_pi = np.sum(pi * rewards, axis=1) * keep
    P_pi = model.policy_matrix(pi)
    if gamma == 1.0:
        _check_policy_ends(P_pi, ~keep)
    if model.is_sparse:
        system = sp.identity(model.n_states, format="csc") - gamma * (sp.diags_array(keep.astype(float)) @ P_pi)
        return np.asarray(spsolve(system.tocsc(), r_pi), dtype=np.float64).reshape(model.n_states)
    system = np.eye(model.n_states) - gamma * keep[:, None] * P_pi
    return np.linalg.solve(system, r_pi)


def _check_policy_ends(P_pi: np.ndarray | sp.csr_array, pinned: np.ndarray) -> None:
    """Raise ``ValueError`` unless every state can reach a pinned (terminal) state under P_pi."""
    n = pinned.shape[0]
    edges = sp.coo_array(P_pi)
    live = edges.data > 0.0
    # Reverse edges (s' -> s) plus a virtual root n -> every terminal; search from the root.
    rows = np.concatenate([edges.coords[1][live], np.full(int(pinned.sum()), n)])
    cols = np.concatenate([edges.coords[0][live], np.flatnonzero(pinned)])
    graph = sp.csr_array((np.ones(rows.size), (rows, cols)), shape=(n + 1, n + 1))
    reached = breadth_first_order(graph, n, directed=True, return_predecessors=False)
    stuck = n + 1 - reached.size
    if stuck:
        raise ValueError(
            f"policy never ends from {stuck} of {n} states: at gamma = 1 every state must reach an "
            "absorbing zero-reward state under the policy (else the values are unbounded or undefined)"
        )


def greedy_policy(Q: np.ndarray) -> np.ndarray:
    """One-hot policy of shape ``(S, A)`` choosing argmax_a Q[s, a]; ties go to the lowest index."""
    values = np.asarray(Q)
    if values.ndim != 2 or values.shape[1] < 1:
        raise ValueError(f"Q must have shape (S, A) with A >= 1, got {values.shape}")
    policy = np.zeros(values.shape)
    policy[np.arange(values.shape[0]), np.argmax(values, axis=1)] = 1.0
    return policy


def q_from_v(
    P: np.ndarray | Sequence[sp.sparray | sp.spmatrix] | TransitionModel,
    R: np.ndarray,
    gamma: float,
    V: np.ndarray,
) -> np.ndarray:
    """Q[s, a] = R[s, a] + gamma * sum_s' P[a][s, s'] V[s'], shape ``(S, A)``."""
    model = TransitionModel.build(P)
    rewards = _check_state_action("R", R, model)
    gamma = require_gamma(gamma)
    values = np.asarray(V, dtype=np.float64)
    if values.shape != (model.n_states,):
        raise ValueError(f"V must have shape (S,) = ({model.n_states},), got {values.shape}")
    return bellman_backup(model, rewards, gamma, values)
