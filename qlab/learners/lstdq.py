"""LSTD-Q policy iteration on stored transitions (Lagoudakis & Parr 2003).

``learn`` stores transitions (the most recent ``max_samples``); every ``refit_every`` stored
transitions the learner runs up to ``n_iterations`` rounds of policy iteration over all of them.
A batch (e.g. one step of ``B`` task copies) is stored exactly as its ``B`` transitions one at a
time; the refit then runs once at the end of a batch in which the count passed a multiple of
``refit_every`` (so with ``B > 1`` it may include up to ``B - 1`` transitions more):

* evaluation (LSTD-Q): ``w = (Phi'(Phi - gamma Phi_pi') / N + ridge I)^-1 Phi' r / N``, where row
  ``i`` of ``Phi`` is ``phi(s_i, a_i)`` and of ``Phi_pi'`` is ``phi(s'_i, pi(s'_i))``, zero when the
  step terminated (a time-cap truncation bootstraps as usual);
* improvement: ``pi`` becomes greedy with respect to ``Q = w . phi``.

It stops early once the relative weight change falls to ``tolerance``.

Features ``phi(s, a)``:

* discrete actions: the state features (``features`` setting) placed in the block of action
  ``a`` (one weight vector per action); the first policy is greedy for all-zero weights;
* continuous actions (the linear-quadratic case, ``features="quadratic"``): quadratic features of
  ``z = [x; u]``, so ``Q = z'Mz + g'z + c``; the greedy control is ``u = -K x + k`` with
  ``K = M_uu^-1 M_ux`` and ``k = -M_uu^-1 g_u / 2`` (kept unchanged when ``M_uu`` is not negative
  definite, where Q has no maximum in ``u``), clipped to the action bounds. Until the first fit
  the policy is ``u = -K0 x`` with ``K0 = initial_gain`` (zero if empty). ``act`` adds Gaussian
  noise of standard deviation ``exploration_std`` to the greedy control (Bradtke, Ydstie & Barto
  1994).

``act`` takes a batch of observations; epsilon follows the number of observations acted on.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from gymnasium import spaces

from qlab.features import (
    FeatureConfig,
    FeatureMap,
    QuadraticFeatures,
    build_features,
    feature_count,
    observation_dim,
    rows_to_csr,
)
from qlab.learners.linear import action_total, epsilon_greedy, least_squares_fit, restore_array, rng_state
from qlab.learners.protocol import QuadraticHead, Transitions
from qlab.learners.schedules import ScheduleConfig, check_epsilon
from qlab.validation import require_gamma, require_int, require_non_negative, require_positive


@dataclass
class LSTDQConfig(FeatureConfig):
    """LSTD-Q policy iteration over stored transitions."""

    gamma: float = 0.99
    refit_every: int = 1_000  # transitions between refits
    n_iterations: int = 10  # policy-iteration rounds per refit (at most)
    tolerance: float = 1e-6  # stop when |w_new - w| <= tolerance * max(1, |w_new|)
    ridge: float = 1e-6  # added to the diagonal of the per-sample LSTD matrix
    max_samples: int = 100_000  # transitions kept (the most recent)
    epsilon: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("constant", 0.1))  # discrete actions
    exploration_std: float = 0.1  # continuous actions: std of the Gaussian noise added in act
    initial_gain: list[list[float]] = field(default_factory=list)  # continuous: K0 (m x n) until the first fit

    def __post_init__(self) -> None:
        super().__post_init__()
        require_gamma(self.gamma)
        for name in ("refit_every", "n_iterations", "max_samples"):
            require_int(name, getattr(self, name), 1)
        require_positive("ridge", self.ridge)
        require_non_negative("tolerance", self.tolerance)
        require_non_negative("exploration_std", self.exploration_std)
        check_epsilon("epsilon", self.epsilon)
        if len({len(row) for row in self.initial_gain}) > 1:
            raise ValueError(f"initial_gain must be a list of equally long rows, got {self.initial_gain!r}")


class _ActionBlocks:
    """Discrete actions: ``phi(s, a)`` is ``phi(s)`` in block ``a`` of ``n_actions`` blocks."""

    def __init__(self, features: FeatureMap, n_actions: int):
        self.features = features
        self.n_actions = n_actions
        self.n_params = features.n_features * n_actions
        self.weights = np.zeros(self.n_params)

    def rows(self, obs: np.ndarray, action: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        idx, val = self.features.rows(obs)
        return idx + np.asarray(action, dtype=np.int64).reshape(-1, 1) * self.features.n_features, val

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        idx, val = self.features.rows(obs)
        table = self.weights.reshape(self.n_actions, self.features.n_features).T
        return np.einsum("bk,bka->ba", val, table[idx])

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        return self.q_values(obs).argmax(axis=1)

    def value(self, obs: np.ndarray) -> np.ndarray:
        return self.q_values(obs).max(axis=1)

    def improve(self) -> bool:
        """The greedy policy follows the weights directly."""
        return True

    def state_dict(self) -> dict[str, Any]:
        return {"weights": self.weights.copy()}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        restore_array("weights", self.weights, state["weights"])


class _QuadraticForm:
    """Continuous actions: ``phi(x, u)`` quadratic in ``z = [x; u]``; affine greedy policy ``u = -K x + k``."""

    def __init__(self, obs_dim: int, action_space: spaces.Box, initial_gain: list[list[float]]):
        self.obs_dim = obs_dim
        self.action_dim = int(action_space.shape[0])
        self.low = np.asarray(action_space.low, dtype=np.float64)
        self.high = np.asarray(action_space.high, dtype=np.float64)
        self.quad = QuadraticFeatures(obs_dim + self.action_dim)
        self.n_params = self.quad.n_features
        self.weights = np.zeros(self.n_params)
        self.gain = np.zeros((self.action_dim, obs_dim))
        if len(initial_gain):
            gain = np.asarray(initial_gain, dtype=np.float64)
            if gain.shape != self.gain.shape or not np.all(np.isfinite(gain)):
                raise ValueError(
                    f"initial_gain must be a finite {self.action_dim} x {obs_dim} list of lists "
                    f"(action dimensions x observation dimensions), got {initial_gain!r}"
                )
            self.gain = gain
        self.offset = np.zeros(self.action_dim)

    def rows(self, obs: np.ndarray, action: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        phi = self.q_features(obs, action)
        return np.broadcast_to(np.arange(self.n_params), phi.shape), phi

    def q_features(self, obs: np.ndarray, action: np.ndarray) -> np.ndarray:
        x = np.asarray(obs, dtype=np.float64).reshape(-1, self.obs_dim)
        u = np.asarray(action, dtype=np.float64).reshape(-1, self.action_dim)
        return self.quad(np.hstack([x, u]))

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        x = np.asarray(obs, dtype=np.float64).reshape(-1, self.obs_dim)
        return np.clip(self.offset - x @ self.gain.T, self.low, self.high)

    def value(self, obs: np.ndarray) -> np.ndarray:
        return self.q_features(obs, self.greedy(obs)) @ self.weights

    def form(self) -> tuple[np.ndarray, np.ndarray, float]:
        """``(M, g, c)`` with ``Q = z'Mz + g'z + c`` for the current weights."""
        return self.quad.to_matrix(self.weights)

    def improve(self) -> bool:
        """Make the policy greedy for the current weights; False (policy kept) if Q is not concave in u."""
        M, g, _ = self.form()
        n = self.obs_dim
        M_uu = M[n:, n:]
        if np.linalg.eigvalsh(M_uu).max() >= 0.0:
            return False
        self.gain = np.linalg.solve(M_uu, M[n:, :n])
        self.offset = -0.5 * np.linalg.solve(M_uu, g[n:])
        return True

    def state_dict(self) -> dict[str, Any]:
        return {"weights": self.weights.copy(), "gain": self.gain.copy(), "offset": self.offset.copy()}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        restore_array("weights", self.weights, state["weights"])
        restore_array("gain", self.gain, state["gain"])
        restore_array("offset", self.offset, state["offset"])


class LSTDQ:
    """LSTD-Q policy iteration; discrete actions, or continuous ones with quadratic features."""

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space, config: LSTDQConfig, seed: int):
        obs_dim = observation_dim(observation_space)
        self.continuous = isinstance(action_space, spaces.Box)
        if self.continuous:
            if len(action_space.shape) != 1:
                raise ValueError(f"LSTDQ needs a 1-D Box or a Discrete action space, got {action_space!r}")
            if config.features != "quadratic":
                raise ValueError(f"features must be 'quadratic' for continuous actions, got {config.features!r}")
            self.head: _ActionBlocks | _QuadraticForm = _QuadraticForm(obs_dim, action_space, config.initial_gain)
            action_shape: tuple[int, ...] = (int(action_space.shape[0]),)
        elif isinstance(action_space, spaces.Discrete):
            if len(config.initial_gain):
                raise ValueError("initial_gain applies to continuous actions only; leave it empty for Discrete actions")
            self.head = _ActionBlocks(build_features(config, observation_space), int(action_space.n))
            action_shape = ()
        else:
            raise ValueError(f"LSTDQ needs a 1-D Box or a Discrete action space, got {action_space!r}")
        self.gamma = float(config.gamma)
        self.refit_every = int(config.refit_every)
        self.n_iterations = int(config.n_iterations)
        self.tolerance = float(config.tolerance)
        self.ridge = float(config.ridge)
        self.epsilon = check_epsilon("epsilon", config.epsilon)
        self.exploration_std = float(config.exploration_std)
        cap = int(config.max_samples)
        self.buffer = {
            "obs": np.zeros((cap, obs_dim)),
            "action": np.zeros((cap, *action_shape), dtype=np.float64 if self.continuous else np.int64),
            "reward": np.zeros(cap),
            "next_obs": np.zeros((cap, obs_dim)),
            "terminated": np.zeros(cap, dtype=bool),
        }
        self.position = 0
        self.size = 0
        self.act_count = 0
        self.learn_count = 0
        self.rng = np.random.default_rng(seed)

    @classmethod
    def memory_bytes(cls, config: LSTDQConfig, observation_space: spaces.Space,
                     action_space: spaces.Space) -> tuple[int, str]:
        """Bytes of the LSTD matrix (k x k float64, k = features x actions) and the stored samples."""
        n_features, settings = feature_count(config, observation_space)
        k = n_features * action_total(action_space)
        samples = int(config.max_samples) * (16 * observation_dim(observation_space) + 32)
        return 8 * k * k + samples, f"{settings}, max_samples"

    # --- optional capabilities (qlab.learners.protocol) -------------------------------------

    @property
    def linear_features(self) -> FeatureMap | None:
        """Discrete actions: the state feature map (one weight block per action); continuous actions: None."""
        return self.head.features if isinstance(self.head, _ActionBlocks) else None

    @property
    def quadratic_head(self) -> QuadraticHead | None:
        """Continuous actions: the quadratic form of ``[x; u]`` and its greedy gain; discrete actions: None."""
        return self.head if isinstance(self.head, _QuadraticForm) else None

    def fit_function_class(self, observations: np.ndarray, targets: np.ndarray, steps: int | None = None) -> np.ndarray:
        """Discrete actions: least squares of ``targets`` ``(N, n_actions)`` on the state features at ``observations``.

        Closed form: ``steps`` is not used. Continuous actions have no finite action set: ``ValueError``.
        """
        features = self.linear_features
        if features is None:
            raise ValueError("fit_function_class needs a finite action set; this LSTDQ has continuous actions")
        return least_squares_fit(features, observations, targets)

    # --- acting -----------------------------------------------------------------------------

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        """Q for every discrete action, ``(B, n_actions)``; continuous actions have no finite set."""
        if isinstance(self.head, _QuadraticForm):
            raise ValueError("q_values needs a finite action set; this LSTDQ has continuous actions (use value or q)")
        return self.head.q_values(obs)

    def q(self, obs: np.ndarray, action: np.ndarray) -> np.ndarray:
        """Q(obs, action) for a batch, ``(B,)`` (action ``(B,)`` indices or ``(B, act_dim)`` controls)."""
        idx, val = self.head.rows(obs, action)
        return np.einsum("bk,bk->b", val, self.head.weights[idx])

    def value(self, obs: np.ndarray) -> np.ndarray:
        """Q at the greedy action, ``(B,)``."""
        return self.head.value(obs)

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        """Greedy actions: ``(B,)`` int64 indices or ``(B, act_dim)`` controls."""
        return self.head.greedy(obs)

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Exploring actions for a batch ``(B, obs_dim)``: epsilon-greedy indices ``(B,)`` int64 (row ``j`` at
        epsilon of ``act_count + j``), or greedy controls plus Gaussian noise ``(B, act_dim)`` float32."""
        obs = np.asarray(obs)
        b = obs.shape[0]
        if isinstance(self.head, _QuadraticForm):
            u = self.head.greedy(obs) + self.exploration_std * self.rng.standard_normal((b, self.head.action_dim))
            self.act_count += b
            return np.clip(u, self.head.low, self.head.high).astype(np.float32)
        epsilon = self.epsilon.over(self.act_count, b)
        self.act_count += b
        return epsilon_greedy(self.head.q_values(obs), epsilon, self.rng)

    # --- learning ---------------------------------------------------------------------------

    def learn(self, batch: Transitions) -> dict[str, float]:
        """Store the batch; refit when another ``refit_every`` transitions have arrived."""
        before = self.learn_count // self.refit_every
        self._store(batch)
        self.learn_count += len(batch)
        if self.learn_count // self.refit_every == before:
            return {}
        return self.refit()

    def _store(self, batch: Transitions) -> None:
        cap = self.buffer["reward"].shape[0]
        k = min(len(batch), cap)
        slots = (self.position + np.arange(k)) % cap
        for name, target in self.buffer.items():
            target[slots] = np.asarray(getattr(batch, name))[-k:].reshape(target[slots].shape)
        self.position = int((self.position + k) % cap)
        self.size = min(self.size + k, cap)

    def refit(self) -> dict[str, float]:
        """Policy iteration over every stored transition; returns refit metrics."""
        data = {name: arr[: self.size] for name, arr in self.buffer.items()}
        n, p = self.size, self.head.n_params
        phi = rows_to_csr(*self.head.rows(data["obs"], data["action"]), p)
        rhs = phi.T @ data["reward"] / n
        keep = ~data["terminated"][:, None]
        change, improved, rounds = np.inf, True, 0
        for _ in range(self.n_iterations):
            rounds += 1
            idx, val = self.head.rows(data["next_obs"], self.head.greedy(data["next_obs"]))
            phi_next = rows_to_csr(idx, val * keep, p)
            lhs = (phi.T @ (phi - self.gamma * phi_next)).toarray() / n + self.ridge * np.eye(p)
            weights = np.linalg.solve(lhs, rhs)
            change = float(np.linalg.norm(weights - self.head.weights) / max(1.0, np.linalg.norm(weights)))
            self.head.weights[:] = weights
            improved = self.head.improve()
            if change <= self.tolerance:
                break
        return {
            "refit_iterations": float(rounds),
            "refit_weight_change": change,
            "refit_samples": float(n),
            "greedy_defined": float(improved),
        }

    # --- checkpoints ------------------------------------------------------------------------

    def state_dict(self) -> dict[str, Any]:
        """Weights (and gain), stored transitions, counters and the RNG state (copies)."""
        return {
            "head": self.head.state_dict(),
            "buffer": {name: arr[: self.size].copy() for name, arr in self.buffer.items()},
            "position": int(self.position),
            "act_count": int(self.act_count),
            "learn_count": int(self.learn_count),
            "rng": rng_state(self.rng),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore everything :meth:`state_dict` saved."""
        self.head.load_state_dict(state["head"])
        size = int(np.asarray(state["buffer"]["reward"]).shape[0])
        for name, arr in self.buffer.items():
            restore_array(f"buffer/{name}", arr[:size], state["buffer"][name])
        self.size = size
        self.position = int(state["position"])
        self.act_count = int(state["act_count"])
        self.learn_count = int(state["learn_count"])
        self.rng.bit_generator.state = state["rng"]
