"""Semi-gradient linear Q-learning: ``Q(s, a) = w_a . phi(s)`` with one weight vector per discrete action.

Update for a transition ``(s, a, r, s')`` (Sutton & Barto 2018, sec. 10.1, with the max of
Q-learning): ``w_a += alpha * delta * phi(s) / n(s)`` with ``delta = r + gamma * max_b Q(s', b) -
Q(s, a)``; the bootstrap term is dropped when the step *terminated* and kept when it was only
*truncated* by a time cap. ``n(s) = |phi(s)|^2`` with ``normalise_step`` (normalised LMS: for
tile coding this is the usual ``alpha / n_tilings``), else 1.

Batches (e.g. one step of ``B`` task copies): all TD errors use the weights from before the
batch; each weight moves by its step size times the average of ``delta * phi_i / n`` over the
transitions of the batch in which feature ``i`` is active for the action taken (a batch of one is
the plain update). A batch therefore equals its ``B`` transitions learned one at a time only when
no weight is touched twice, no TD error reads a weight the batch changes and the step size stays
the same; otherwise it is this averaged update.

Step sizes: ``step_size_count="step"`` evaluates the schedule at the number of transitions
learned so far; ``"visits"`` at the number of earlier updates of that weight with its feature
active (for one-hot features: the visit count of the state-action pair, so the ``polynomial``
schedule gives ``1/n`` or ``1/n^w`` steps; a batch reads the count from before it). Exploration is
epsilon-greedy, ``act`` taking a batch of observations, with epsilon scheduled by the number of
observations acted on (``B`` per call); greedy ties are broken at random in ``act`` and by the
lowest index in ``greedy``.

:meth:`LinearQ.initialise_from` starts Q at a given function of the state, e.g. the task's
potential Phi: shaping with Phi and starting Q at Phi are the same for Q-learning on a table
(Wiewiora 2003, "Potential-based shaping and Q-value initialization are equivalent", JAIR 19).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg
import scipy.sparse as sp
from gymnasium import spaces
from scipy.sparse.linalg import lsmr
from scipy.stats import qmc

from qlab.features import FeatureConfig, FeatureMap, GaussianRBF, GridBins, TileCoder, build_features, feature_count
from qlab.learners.protocol import Transitions
from qlab.learners.schedules import ScheduleConfig, check_epsilon
from qlab.validation import require_choice, require_gamma

STEP_SIZE_COUNTS = ("step", "visits")

#: Most sample points a least-squares start uses; a finer grid gives way to a fixed Halton sample of this size.
MAX_FIT_POINTS = 1 << 17

#: Sample points per centre spacing of RBF features, and per dimension for quadratic features.
RBF_POINTS_PER_SPACING = 4
QUADRATIC_POINTS_PER_DIM = 5

#: Rows of a dense feature map summed into the normal equations at a time.
GRAM_CHUNK_ROWS = 8192


@dataclass
class QLearningConfig:
    """Settings shared by the tabular and linear Q-learners."""

    gamma: float = 0.99
    epsilon: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("constant", 0.1))
    step_size: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("constant", 0.1))
    step_size_count: str = "step"  # "step" | "visits"

    def __post_init__(self) -> None:
        require_gamma(self.gamma)
        check_epsilon("epsilon", self.epsilon)
        self.step_size.build("step_size")
        if not self.step_size.start > 0:
            raise ValueError(f"step_size.start must be > 0, got {self.step_size.start!r}")
        require_choice("step_size_count", self.step_size_count, STEP_SIZE_COUNTS)


@dataclass
class LinearConfig(QLearningConfig, FeatureConfig):
    """Semi-gradient linear Q-learning on the feature map named by ``features``."""

    normalise_step: bool = True  # divide the step by |phi(s)|^2 (normalised LMS)

    def __post_init__(self) -> None:
        FeatureConfig.__post_init__(self)
        QLearningConfig.__post_init__(self)


def action_count(space: spaces.Space, learner: str) -> int:
    """Number of actions of a ``Discrete`` space, else ``ValueError``."""
    if not isinstance(space, spaces.Discrete):
        raise ValueError(f"{learner} needs a Discrete action space, got {space!r}")
    return int(space.n)


def action_total(space: spaces.Space) -> int:
    """Number of actions of a ``Discrete`` space, 1 for any other (memory estimates only)."""
    return int(space.n) if isinstance(space, spaces.Discrete) else 1


def epsilon_greedy(q: np.ndarray, epsilon: np.ndarray | float, rng: np.random.Generator) -> np.ndarray:
    """Per row of ``q`` ``(B, n_actions)``: a uniformly random action with probability ``epsilon`` (per row
    or shared), else a greedy one, ties broken uniformly at random; ``(B,)`` int64.

    Draws ``B x (n_actions + 1)`` uniforms from ``rng`` in one call whatever happens: per row, the
    first decides whether to explore; the rest are i.i.d., so the index of their largest value is a
    uniformly random action, and the index of their largest value among the tied maxima of ``q`` is
    a uniformly random greedy action.
    """
    draws = rng.random((q.shape[0], q.shape[1] + 1))
    explore = draws[:, 0] < epsilon
    scores = draws[:, 1:]
    greedy = np.where(q == q.max(axis=1, keepdims=True), scores, -1.0).argmax(axis=1)
    return np.where(explore, scores.argmax(axis=1), greedy)


def sum_by_key(keys: np.ndarray, values: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, ...]:
    """The distinct ``keys`` ``(K,)`` and the sums of ``values`` and ``counts`` over each; returned as given
    when the keys are already distinct (each sum taken in the keys' order, as ``np.bincount`` does)."""
    if keys.size < 2:
        return keys, values, counts
    order = np.argsort(keys, kind="stable")
    ordered = keys[order]
    first = np.empty(keys.size, dtype=bool)
    first[:1] = True
    np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
    if first.all():
        return keys, values, counts
    group = np.cumsum(first) - 1
    return ordered[first], np.bincount(group, weights=values[order]), np.bincount(group, weights=counts[order])


def rng_state(rng: np.random.Generator) -> dict[str, Any]:
    """The generator's bit-generator state (JSON-able)."""
    return rng.bit_generator.state


def restore_array(name: str, target: np.ndarray, value: Any) -> None:
    """Copy ``value`` into ``target`` in place, checking the shape."""
    arr = np.asarray(value)
    if arr.shape != target.shape:
        raise ValueError(f"state {name!r} must have shape {target.shape}, got {arr.shape}")
    target[...] = arr


def function_values(values: Callable[[np.ndarray], np.ndarray], obs: np.ndarray) -> np.ndarray:
    """``values(obs)`` as a finite float array ``(B,)``, else ``ValueError``."""
    out = np.asarray(values(obs), dtype=np.float64)
    if out.shape != (obs.shape[0],) or not np.all(np.isfinite(out)):
        raise ValueError(
            f"values must map observations (B, d) to finite values (B,), got shape {out.shape} for B = {obs.shape[0]}"
        )
    return out


def least_squares_weights(features: FeatureMap, obs: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """Weights ``W`` ``(n_features, k)`` minimising ``|features(obs) @ W[:, j] - targets[:, j]|`` for each column.

    ``targets`` is ``(N, k)``. Maps with few active features per row (grid bins, tiles): LSMR
    (Fong & Saunders 2011) on the sparse design with unit-norm columns, to round-off. Dense maps
    (RBF, quadratic): the normal equations, summed over chunks of rows and scaled to a unit
    diagonal, solved by SVD (``scipy.linalg.lstsq``). Either way a feature never active at
    ``obs`` gets weight 0 (minimum norm), and the fitted values are the orthogonal projection of
    each target column onto the span of the features at ``obs``. The normal equations square the
    condition number: strongly overlapping RBFs (``rbf_width`` 2 and up) fit to about 1e-7
    relative rather than to round-off.
    """
    obs = np.asarray(obs)
    target = np.asarray(targets, dtype=np.float64).reshape(obs.shape[0], -1)
    if features.rows(obs[:1])[0].shape[1] == features.n_features:
        return _normal_equation_weights(features, obs, target)
    design = features.sparse(obs)
    scale = _unit_scale(np.asarray(design.multiply(design).sum(axis=0)).ravel())
    scaled = design @ sp.diags_array(scale)
    solve = [lsmr(scaled, column, atol=1e-14, btol=1e-14, maxiter=50 * features.n_features)[0] for column in target.T]
    return scale[:, None] * np.stack(solve, axis=1)


def least_squares_fit(features: FeatureMap, obs: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """The fitted values ``features(obs) @ W`` ``(N, k)`` of :func:`least_squares_weights`: each column of ``targets``
    projected onto the span of the features at ``obs``."""
    return features.sparse(obs) @ least_squares_weights(features, obs, targets)


def _unit_scale(squared_norms: np.ndarray) -> np.ndarray:
    """``1 / sqrt(squared_norms)``, 0 where a norm is 0."""
    norms = np.sqrt(squared_norms)
    return np.divide(1.0, norms, out=np.zeros_like(norms), where=norms > 0)


def _normal_equation_weights(features: FeatureMap, obs: np.ndarray, target: np.ndarray) -> np.ndarray:
    n = features.n_features
    gram, rhs = np.zeros((n, n)), np.zeros((n, target.shape[1]))
    for start in range(0, obs.shape[0], GRAM_CHUNK_ROWS):
        rows = slice(start, start + GRAM_CHUNK_ROWS)
        phi = features(obs[rows])
        gram += phi.T @ phi
        rhs += phi.T @ target[rows]
    scale = _unit_scale(np.diag(gram).copy())
    solution = scipy.linalg.lstsq(gram * np.outer(scale, scale), rhs * scale[:, None])[0]
    return scale[:, None] * solution


def fit_points(features: FeatureMap, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """A fixed sample of the box ``[low, high]`` fine enough to pin down the features, ``(N, d)``.

    Along each dimension: the midpoints of a uniform division with one part per cell of a grid
    map, per elementary cell of a tile coder (its tile width over the number of tilings),
    ``RBF_POINTS_PER_SPACING`` per centre spacing of an RBF map or ``QUADRATIC_POINTS_PER_DIM``
    for quadratic features, plus the upper bound itself (where a tile coder's unshifted tiling has
    a tile of its own); the sample is their product grid. A grid of more than ``MAX_FIT_POINTS``
    points is replaced by the first ``MAX_FIT_POINTS`` points of the (unscrambled) Halton
    sequence scaled to the box.
    """
    if isinstance(features, GridBins):
        counts = features.bins
    elif isinstance(features, TileCoder):
        counts = features.bins * features.n_tilings
    elif isinstance(features, GaussianRBF):
        counts = RBF_POINTS_PER_SPACING * np.array([np.unique(c).size for c in features.centres.T])
    else:
        counts = np.full(features.dim, QUADRATIC_POINTS_PER_DIM)
    low, high = np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)
    if np.prod(counts + 1.0) > MAX_FIT_POINTS:
        return low + qmc.Halton(d=low.size, scramble=False).random(MAX_FIT_POINTS) * (high - low)
    axes = [
        np.append(lo + (np.arange(n) + 0.5) * (hi - lo) / n, hi) for lo, hi, n in zip(low, high, counts, strict=True)
    ]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, low.size)


class LinearQ:
    """Semi-gradient Q-learning with ``Q(s, a) = sum_i W[i, a] phi_i(s)``."""

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space, config: LinearConfig, seed: int):
        self._setup(build_features(config, observation_space), action_space, config, seed, config.normalise_step)
        self.observation_space = observation_space

    @classmethod
    def memory_bytes(cls, config: LinearConfig, observation_space: spaces.Space,
                     action_space: spaces.Space) -> tuple[int, str]:
        """Bytes of the weights and visit counts (8 + 8 per feature and action), and the settings that decide it."""
        n_features, settings = feature_count(config, observation_space)
        return 16 * n_features * action_total(action_space), settings

    def _setup(
        self,
        features: FeatureMap,
        action_space: spaces.Space,
        config: QLearningConfig,
        seed: int,
        normalise: bool,
        initial_weight: float = 0.0,
    ) -> None:
        self.features = features
        self.n_actions = action_count(action_space, type(self).__name__)
        self.gamma = float(config.gamma)
        self.epsilon = check_epsilon("epsilon", config.epsilon)
        self.step_size = config.step_size.build("step_size")
        self.by_visits = config.step_size_count == "visits"
        self.normalise = bool(normalise)
        self.weights = np.full((features.n_features, self.n_actions), float(initial_weight))
        self.visits = np.zeros((features.n_features, self.n_actions), dtype=np.int64)
        self.act_count = 0
        self.learn_count = 0
        self.rng = np.random.default_rng(seed)

    # --- optional capabilities (qlab.learners.protocol) -------------------------------------

    @property
    def linear_features(self) -> FeatureMap:
        """The state feature map: ``Q(s, a) = W[:, a] . phi(s)``."""
        return self.features

    def fit_function_class(self, observations: np.ndarray, targets: np.ndarray, steps: int | None = None) -> np.ndarray:
        """Least squares of ``targets`` ``(N, n_actions)`` on the features at ``observations``, one column per action.

        Closed form: ``steps`` is not used.
        """
        return least_squares_fit(self.features, observations, targets)

    # --- acting -----------------------------------------------------------------------------

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        """Q for every action, ``(B, n_actions)``."""
        return self._features_and_q(obs)[2]

    def _features_and_q(self, obs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sparse feature rows ``(idx, val)`` of ``obs`` and Q ``(B, n_actions)``."""
        idx, val = self.features.rows(obs)
        if self.features.binary:  # a sum of the active weights (for a table: one row of it)
            return idx, val, self.weights[idx].sum(axis=1)
        return idx, val, np.einsum("bk,bka->ba", val, self.weights[idx])

    def value(self, obs: np.ndarray) -> np.ndarray:
        """max_a Q(obs, a), ``(B,)``."""
        return self.q_values(obs).max(axis=1)

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        """Greedy actions ``(B,)`` int64 (ties: lowest index)."""
        return self.q_values(obs).argmax(axis=1)

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Epsilon-greedy actions ``(B,)`` int64 for a batch ``(B, obs_dim)``; row ``j`` explores with
        epsilon at ``act_count + j`` (the schedule counts transitions, ``B`` per call)."""
        q = self.q_values(obs)
        epsilon = self.epsilon.over(self.act_count, q.shape[0])
        self.act_count += q.shape[0]
        return epsilon_greedy(q, epsilon, self.rng)

    def initialise_from(self, values: Callable[[np.ndarray], np.ndarray]) -> None:
        """Start every action's Q at ``values`` (observations ``(B, d)`` -> ``(B,)``), e.g. the task's potential.

        The weights become the least-squares fit of ``values`` at :func:`fit_points` of the feature
        box (the map's ``low``/``high``; for quadratic features the observation space's bounds,
        which must be finite), the same for every action. Exact up to round-off when ``values`` lies
        in the span of the features (a constant per tile, a quadratic for quadratic features);
        otherwise only the best fit on those points, so Q starts near, not at, ``values``. Visit
        counts and counters are left as they are.
        """
        features = self.features
        if isinstance(features, GridBins | TileCoder | GaussianRBF):
            low, high = features.low, features.high
        else:
            low = np.asarray(self.observation_space.low, dtype=np.float64)
            high = np.asarray(self.observation_space.high, dtype=np.float64)
            if not (np.all(np.isfinite(low)) and np.all(np.isfinite(high))):
                raise ValueError(
                    "initialise_from needs a bounded box to fit in: features 'quadratic' on an observation space "
                    f"with infinite bounds (low={low.tolist()}, high={high.tolist()}); use 'grid', 'tiles' or 'rbf'"
                )
        points = fit_points(features, low, high)
        self.weights[:] = least_squares_weights(features, points, function_values(values, points)[:, None])

    # --- learning ---------------------------------------------------------------------------

    def learn(self, batch: Transitions) -> dict[str, float]:
        """One semi-gradient Q-learning update from a batch of transitions."""
        b = len(batch)
        idx, val, q = self._features_and_q(np.concatenate([batch.obs, batch.next_obs]))  # one call for s and s'
        idx, val = idx[:b], val[:b]
        action = np.asarray(batch.action, dtype=np.int64).reshape(-1)
        bootstrap = np.where(np.asarray(batch.terminated, dtype=bool), 0.0, q[b:].max(axis=1))
        delta = np.asarray(batch.reward, dtype=np.float64) + self.gamma * bootstrap - q[np.arange(b), action]
        scale = (val * val).sum(axis=1) if self.normalise else np.ones(b)
        contribution = np.divide(delta, scale, out=np.zeros_like(delta), where=scale > 0)[:, None] * val
        keys = idx * self.n_actions + action[:, None]  # (B, k) flat positions in the weight table
        alpha = self._apply(keys.ravel(), contribution.ravel(), (val != 0).ravel().astype(np.float64))
        return self._metrics(delta, q[:b], alpha)

    def _apply(self, keys: np.ndarray, contribution: np.ndarray, active: np.ndarray) -> np.ndarray:
        """Move each flat weight in ``keys`` by its step size times the mean ``contribution`` over the entries
        naming it (``active``: 1 where the feature is non-zero); count visits and transitions; the step sizes."""
        where, total, hits = sum_by_key(keys, contribution, active)
        flat_weights, flat_visits = self.weights.reshape(-1), self.visits.reshape(-1)
        alpha = np.asarray(self.step_size(flat_visits[where] if self.by_visits else self.learn_count))
        flat_weights[where] += alpha * total / np.maximum(hits, 1.0)
        flat_visits[where] += hits.astype(np.int64)
        return alpha

    def _metrics(self, delta: np.ndarray, q: np.ndarray, alpha: np.ndarray) -> dict[str, float]:
        """Learning metrics of a batch: TD errors, Q(s, .) before the update ``(B, n_actions)``, step sizes."""
        self.learn_count += delta.size
        return {
            "abs_td_error": float(np.abs(delta).sum()) / delta.size,
            "q_mean": float(q.sum()) / q.size,
            "q_max": float(q.max()),
            "step_size": float(alpha.max()),
            "epsilon": float(self.epsilon(self.act_count)),
        }

    # --- checkpoints ------------------------------------------------------------------------

    def state_dict(self) -> dict[str, Any]:
        """Weights, visit counts, counters and the RNG state (copies)."""
        return {
            "weights": self.weights.copy(),
            "visits": self.visits.copy(),
            "act_count": int(self.act_count),
            "learn_count": int(self.learn_count),
            "rng": rng_state(self.rng),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore everything :meth:`state_dict` saved."""
        restore_array("weights", self.weights, state["weights"])
        restore_array("visits", self.visits, state["visits"])
        self.act_count = int(state["act_count"])
        self.learn_count = int(state["learn_count"])
        self.rng.bit_generator.state = state["rng"]
