"""Finite-MDP reference: value iteration and policy evaluation against published and closed-form values."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given
from hypothesis import strategies as st

from qlab.reference import evaluate_policy, greedy_policy, q_from_v, value_iteration

# ---------------------------------------------------------------- Sutton & Barto (2018), Example 3.5

GRID = 5
NORTH, SOUTH, EAST, WEST = range(4)
MOVES = np.array([(-1, 0), (1, 0), (0, 1), (0, -1)])  # (row, column) steps; row 0 is the top row


def sutton_barto_gridworld() -> tuple[np.ndarray, np.ndarray]:
    """The 5x5 gridworld of Sutton & Barto (2018), Example 3.5, as dense P (A, S, S) and R (S, A).

    State s = row * 5 + column. Off-grid moves stay put with reward -1; every action from
    A = (0, 1) gives +10 and lands on A' = (4, 1); every action from B = (0, 3) gives +5 and lands
    on B' = (2, 3); all other moves give 0.
    """
    rows, cols = np.divmod(np.arange(GRID * GRID), GRID)
    target_r = rows[None, :] + MOVES[:, 0, None]  # (A, S)
    target_c = cols[None, :] + MOVES[:, 1, None]
    inside = (target_r >= 0) & (target_r < GRID) & (target_c >= 0) & (target_c < GRID)
    nxt = np.where(inside, target_r * GRID + target_c, np.arange(GRID * GRID)[None, :])
    reward = np.where(inside, 0.0, -1.0)
    for special, landing, bonus in ((0 * GRID + 1, 4 * GRID + 1, 10.0), (0 * GRID + 3, 2 * GRID + 3, 5.0)):
        nxt[:, special] = landing
        reward[:, special] = bonus
    P = np.zeros((4, GRID * GRID, GRID * GRID))
    P[np.arange(4)[:, None], np.arange(GRID * GRID)[None, :], nxt] = 1.0
    return P, reward.T


# Sutton & Barto (2018), Fig. 3.2: v_pi of the equiprobable random policy, gamma = 0.9
# (from memory of the printed tables).
FIG_3_2_V_RANDOM = np.array(
    [
        [3.3, 8.8, 4.4, 5.3, 1.5],
        [1.5, 3.0, 2.3, 1.9, 0.5],
        [0.1, 0.7, 0.7, 0.4, -0.4],
        [-1.0, -0.4, -0.4, -0.6, -1.2],
        [-1.9, -1.3, -1.2, -1.4, -2.0],
    ]
)
# Sutton & Barto (2018), Fig. 3.5: v*, gamma = 0.9 (from memory of the printed tables).
FIG_3_5_V_STAR = np.array(
    [
        [22.0, 24.4, 22.0, 19.4, 17.5],
        [19.8, 22.0, 19.8, 17.8, 16.0],
        [17.8, 19.8, 17.8, 16.0, 14.4],
        [16.0, 17.8, 16.0, 14.4, 13.0],
        [14.4, 16.0, 14.4, 13.0, 11.7],
    ]
)
ONE_DECIMAL = 0.05 + 1e-9  # the printed tables are rounded to one decimal


def test_gridworld_random_policy_matches_fig_3_2():
    P, R = sutton_barto_gridworld()
    V = evaluate_policy(P, R, 0.9, np.full((GRID * GRID, 4), 0.25))
    # Sutton & Barto (2018), Fig. 3.2 (from memory of the printed table)
    np.testing.assert_allclose(V.reshape(GRID, GRID), FIG_3_2_V_RANDOM, rtol=0, atol=ONE_DECIMAL)


def test_gridworld_optimal_values_match_fig_3_5():
    P, R = sutton_barto_gridworld()
    Q = value_iteration(P, R, 0.9)
    # Sutton & Barto (2018), Fig. 3.5 (from memory of the printed table)
    np.testing.assert_allclose(Q.max(axis=1).reshape(GRID, GRID), FIG_3_5_V_STAR, rtol=0, atol=ONE_DECIMAL)


def test_gridworld_optimal_actions_from_a_are_all_equal():
    P, R = sutton_barto_gridworld()
    Q = value_iteration(P, R, 0.9)
    # Sutton & Barto (2018), Example 3.5: every action from A pays +10 and jumps to A' = (4, 1),
    # so Q*(A, .) = 10 + 0.9 * v*(A'); v*(A') = 16.0 in Fig. 3.5 (from memory of the printed table).
    np.testing.assert_allclose(Q[0 * GRID + 1], 10.0 + 0.9 * Q[4 * GRID + 1].max(), rtol=1e-12)
    assert abs(Q[4 * GRID + 1].max() - 16.0) <= ONE_DECIMAL


# ---------------------------------------------------------------- closed forms


def test_constant_reward_forever_is_geometric_series():
    # A constant reward of 1 forever with gamma = 0.9 is worth 1 / (1 - 0.9) = 10
    # (geometric series; common practice, no source).
    P = np.ones((1, 1, 1))
    R = np.ones((1, 1))
    np.testing.assert_allclose(value_iteration(P, R, 0.9), [[10.0]], rtol=1e-9)
    np.testing.assert_allclose(evaluate_policy(P, R, 0.9, np.ones((1, 1))), [10.0], rtol=1e-12)
    # Same series at gamma = 0.99: 1 / (1 - 0.99) = 100 (about 2,700 sweeps; must converge without a warning).
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        np.testing.assert_allclose(value_iteration(P, R, 0.99), [[100.0]], rtol=1e-9)


def slow_fast_chain(n_live: int) -> tuple[list[sp.csr_array], np.ndarray]:
    """Chain 0 .. n_live, terminal n_live (absorbing, reward 0); each step costs 1 (reward -1).

    Action 0 ("fast") always advances one state; action 1 ("slow") advances with probability 0.5
    and stays put otherwise. Every policy ends with probability 1.
    """
    S = n_live + 1
    live = np.arange(n_live)
    fast = sp.lil_array((S, S))
    fast[live, live + 1] = 1.0
    slow = sp.lil_array((S, S))
    slow[live, live] = 0.5
    slow[live, live + 1] = 0.5
    for m in (fast, slow):
        m[n_live, n_live] = 1.0
    R = np.zeros((S, 2))
    R[:n_live] = -1.0
    return [fast.tocsr(), slow.tocsr()], R


def test_undiscounted_episodic_chain_gives_minus_distance():
    n_live = 7
    P, R = slow_fast_chain(n_live)
    distance = n_live - np.arange(n_live + 1)  # steps to the terminal on the fast action
    Q = value_iteration(P, R, 1.0)
    # Hand-worked: the fast action reaches the terminal after d steps at -1 each, so V*(s) = -d.
    np.testing.assert_allclose(Q.max(axis=1), -distance, atol=1e-8)
    # Hand-worked: Q*(s, slow) = -1 + 0.5 * V*(s + 1) + 0.5 * V*(s) = -1 - 0.5 (d - 1) - 0.5 d = -d - 0.5
    np.testing.assert_allclose(Q[:n_live, 1], -distance[:n_live] - 0.5, atol=1e-8)
    slow_policy = np.tile([0.0, 1.0], (n_live + 1, 1))
    # Hand-worked: each advance under "slow" takes 1 / 0.5 = 2 steps on average (geometric trials), so V = -2 d.
    np.testing.assert_allclose(evaluate_policy(P, R, 1.0, slow_policy), -2.0 * distance, atol=1e-9)


def test_undiscounted_non_terminating_policy_warns():
    # State 0 either loops paying +1 or exits to the absorbing terminal 1 for 0: at gamma = 1
    # looping forever is unbounded, so value iteration cannot converge (V_k(0) = k).
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = 1.0
    P[1, 0, 1] = 1.0
    P[:, 1, 1] = 1.0
    R = np.array([[1.0, 0.0], [0.0, 0.0]])
    with pytest.warns(RuntimeWarning, match="did not converge"):
        Q = value_iteration(P, R, 1.0, max_iter=50)
    assert Q[0, 0] == pytest.approx(51.0)  # hand-worked: 50 sweeps from V = 0 give V(0) = 50
    with pytest.raises(ValueError, match="policy never ends"):
        evaluate_policy(P, R, 1.0, np.array([[1.0, 0.0], [1.0, 0.0]]))
    np.testing.assert_allclose(evaluate_policy(P, R, 1.0, np.array([[0.0, 1.0], [1.0, 0.0]])), [0.0, 0.0])


# ---------------------------------------------------------------- random MDPs (hypothesis)


@st.composite
def random_mdps(draw):
    """(P dense (A, S, S), R (S, A), gamma, potential Phi (S,)) with absorbing zero-reward terminals.

    Phi is 0 at the terminals. At gamma = 1 every action leads to a terminal with probability >= 0.2,
    so every policy ends.
    """
    n_states = draw(st.integers(2, 8))
    n_actions = draw(st.integers(1, 4))
    gamma = draw(st.sampled_from([0.0, 0.5, 0.9, 0.99, 1.0]))
    n_terminal = draw(st.integers(1 if gamma == 1.0 else 0, min(2, n_states - 1)))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    sparsity = rng.random((n_actions, n_states, n_states)) < 0.6
    weights = rng.random((n_actions, n_states, n_states)) * sparsity
    weights[:, :, 0] += 1e-3  # keep every row non-empty
    P = weights / weights.sum(axis=2, keepdims=True)
    terminal = np.zeros(n_states, dtype=bool)
    terminal[n_states - n_terminal :] = True
    if gamma == 1.0:
        to_terminal = np.zeros(n_states)
        to_terminal[terminal] = 1.0 / n_terminal
        P = 0.8 * P + 0.2 * to_terminal
    P[:, terminal, :] = 0.0
    P[:, terminal, terminal] = 1.0
    R = rng.normal(size=(n_states, n_actions))
    R[terminal] = 0.0
    phi = np.where(terminal, 0.0, rng.uniform(-3.0, 3.0, size=n_states))
    return P, R, gamma, phi


@given(random_mdps())
def test_dense_and_sparse_transitions_agree(mdp):
    P, R, gamma, _ = mdp
    sparse_P = [sp.csr_array(m) for m in P]
    # The same Bellman operator through numpy and through scipy.sparse gives the same answer.
    np.testing.assert_allclose(value_iteration(sparse_P, R, gamma), value_iteration(P, R, gamma), atol=1e-9)
    policy = greedy_policy(R)
    np.testing.assert_allclose(
        evaluate_policy(sparse_P, R, gamma, policy), evaluate_policy(P, R, gamma, policy), atol=1e-9
    )


@given(random_mdps())
def test_optimal_values_equal_value_of_greedy_policy(mdp):
    P, R, gamma, _ = mdp
    Q = value_iteration(P, R, gamma)
    V_star = Q.max(axis=1)
    # V* = V^{pi*} for the greedy policy of Q* (Bellman optimality; Sutton & Barto 2018, Sec. 3.6)
    np.testing.assert_allclose(evaluate_policy(P, R, gamma, greedy_policy(Q)), V_star, atol=1e-7)
    # Q* is the fixed point of its own backup (Bellman optimality equation; Sutton & Barto 2018, Sec. 3.6)
    np.testing.assert_allclose(q_from_v(P, R, gamma, V_star), Q, atol=1e-7)


@given(random_mdps())
def test_potential_based_shaping_keeps_optimal_policy(mdp):
    P, R, gamma, phi = mdp
    shaping = gamma * (P @ phi).T - phi[:, None]  # F(s, a) = gamma * E[Phi(s')] - Phi(s)
    Q_star = value_iteration(P, R, gamma)
    Q_shaped = value_iteration(P, R + shaping, gamma)
    # Ng, Harada & Russell (1999), Theorem 1: Q*_shaped(s, a) = Q*(s, a) - Phi(s) ...
    np.testing.assert_allclose(Q_shaped, Q_star - phi[:, None], atol=1e-7)
    # ... so the shaped problem's greedy policy is optimal for the unshaped one (compare values: ties exist).
    V_of_shaped_greedy = evaluate_policy(P, R, gamma, greedy_policy(Q_shaped))
    np.testing.assert_allclose(V_of_shaped_greedy, Q_star.max(axis=1), atol=1e-7)


def test_greedy_policy_breaks_ties_to_lowest_index():
    Q = np.array([[1.0, 3.0, 3.0], [2.0, 2.0, 2.0], [0.0, -1.0, 5.0]])
    np.testing.assert_array_equal(greedy_policy(Q), [[0, 1, 0], [1, 0, 0], [0, 0, 1]])


# ---------------------------------------------------------------- bad inputs


def _valid_mdp() -> tuple[np.ndarray, np.ndarray]:
    P = np.zeros((2, 3, 3))
    P[:, :, 0] = 1.0
    return P, np.zeros((3, 2))


@pytest.mark.parametrize(
    ("P", "R", "gamma", "message"),
    [
        (np.ones((3, 3)), np.zeros((3, 2)), 0.9, r"P must have shape \(A, S, S\)"),
        (np.ones((2, 3, 4)) / 4, np.zeros((3, 2)), 0.9, r"P must have shape \(A, S, S\)"),
        (np.full((2, 3, 3), 0.3), np.zeros((3, 2)), 0.9, r"P\[0\] row 0 sums to .* must sum to 1"),
        (np.tile([[[2.0, -1.0, 0.0]]], (2, 3, 1)), np.zeros((3, 2)), 0.9, "non-negative"),
        (_valid_mdp()[0], np.zeros((2, 3)), 0.9, r"R must have shape \(S, A\) = \(3, 2\)"),
        (_valid_mdp()[0], np.full((3, 2), np.nan), 0.9, "R must be finite"),
        (_valid_mdp()[0], np.zeros((3, 2)), 1.5, r"gamma must lie in \[0, 1\]"),
        (_valid_mdp()[0], np.zeros((3, 2)), -0.1, r"gamma must lie in \[0, 1\]"),
        (_valid_mdp()[0], np.zeros((3, 2)), float("nan"), r"gamma must lie in \[0, 1\]"),
        ([sp.csr_array(np.eye(3)), sp.csr_array(np.eye(2))], np.zeros((3, 2)), 0.9, r"every P\[a\] must have shape"),
        ([sp.csr_array(np.eye(3)), np.eye(3)], np.zeros((3, 2)), 0.9, "mixes sparse and dense"),
        ([sp.csr_array(np.eye(3)), sp.csr_array(0.5 * np.eye(3))], np.zeros((3, 2)), 0.9, r"P\[1\] row 0 sums"),
    ],
)
def test_bad_inputs_raise_value_error(P, R, gamma, message):
    with pytest.raises(ValueError, match=message):
        value_iteration(P, R, gamma)
    with pytest.raises(ValueError, match=message):
        evaluate_policy(P, R, gamma, np.full((3, 2), 0.5))


def test_bad_solver_settings_and_policies_raise_value_error():
    P, R = _valid_mdp()
    with pytest.raises(ValueError, match="tol must be a finite number > 0"):
        value_iteration(P, R, 0.9, tol=0.0)
    with pytest.raises(ValueError, match="max_iter must be an integer >= 1"):
        value_iteration(P, R, 0.9, max_iter=0)
    with pytest.raises(ValueError, match=r"policy row 1 sums to .* must sum to 1"):
        evaluate_policy(P, R, 0.9, np.array([[0.5, 0.5], [0.5, 0.2], [1.0, 0.0]]))
    with pytest.raises(ValueError, match=r"policy must have shape \(S, A\)"):
        evaluate_policy(P, R, 0.9, np.full((2, 3), 0.5))
    with pytest.raises(ValueError, match=r"V must have shape \(S,\)"):
        q_from_v(P, R, 0.9, np.zeros(4))
    with pytest.raises(ValueError, match=r"Q must have shape \(S, A\)"):
        greedy_policy(np.zeros(3))


def test_converged_run_emits_no_warning():
    P, R = sutton_barto_gridworld()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        value_iteration(P, R, 0.9)
        value_iteration(P, R, 0.0)
