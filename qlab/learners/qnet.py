"""Q-network learner (DQN family) for small CPU problems.

An MLP maps an observation to one Q-value per discrete action, through a plain linear output
layer or a dueling head (:mod:`qlab.learners.networks`). Transitions go to a replay memory,
uniform (:class:`~qlab.learners.replay.ReplayBuffer`) or prioritized
(:class:`~qlab.learners.prioritized.PrioritizedReplay`); after ``warmup_steps`` environment steps
a gradient step is taken every ``update_every`` steps (once the replay holds a minibatch) on a
sampled minibatch, regressing Q(s, a) on the n-step target ``R + d * b(s')`` where ``R`` is the
n-step discounted reward sum, ``d`` the bootstrap discount (0 after a termination) and ``b``
the bootstrap value from a target network (:func:`bootstrap_values`: max, or the Double DQN
estimate of van Hasselt et al. 2016).
The objective is the mean TD loss (squared or Huber) plus an optional L2/L1 weight penalty; with
prioritized replay each sample's TD loss is multiplied by its importance-sampling weight, and
after the step the sampled slots' priorities are set from the TD errors of that update (Schaul
et al. 2016, Algorithm 1). The target network follows the online one by a periodic copy or by
Polyak averaging.

Input scaling (``scale_inputs``): the replay stores raw observations; they are scaled
(:class:`~qlab.learners.scaling.InputScaler`) whenever they enter a network, in ``act``,
``greedy``, ``value``, ``q_values`` and on both sides of an update. Bounded observation
dimensions map affinely onto [-1, 1]. Unbounded ones enter as they are by default
(``standardise_unbounded=False``: CartPole-v1's velocities, already of order 1, held a learned
policy better so); with ``standardise_unbounded=True`` they are standardised with running moments
that are updated from the ``obs`` of each ``learn`` batch, before that batch's updates, and nowhere
else (acting never changes them). The moments are part of the state, so resuming is exact.

Batches: ``act`` takes ``(B, obs_dim)`` observations, e.g. of ``B`` task copies; ``learn`` takes a
batch of ``B`` transitions, one per copy, and counts ``B`` environment steps, so the number of
gradient updates per environment transition stays ``1 / update_every`` (the updates due within
a batch are taken after it is stored). The replay keeps one stream per copy, so n-step returns
never mix copies; every ``learn`` call must then carry the same ``B``.

Randomness: network initialisation uses a ``torch.Generator`` owned by the learner (the global
torch RNG is never read or touched); exploration and replay sampling (uniform or prioritized) use
the learner's numpy ``Generator``. Both states are part of :meth:`QNetLearner.state_dict`, with the
replay's priorities and the scaler's moments, so with the same seed and the same
``torch_threads`` a run and its resumed copy produce identical results on CPU.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from gymnasium import spaces
from torch import nn

from qlab.learners.networks import HEADS, build_qnet
from qlab.learners.prioritized import PrioritizedReplay
from qlab.learners.protocol import Transitions
from qlab.learners.replay import ReplayBuffer
from qlab.learners.scaling import InputScaler
from qlab.learners.schedules import Schedule, ScheduleConfig, check_epsilon
from qlab.learners.sumtree import SumTree
from qlab.validation import (
    require_choice,
    require_gamma,
    require_int,
    require_int_list,
    require_non_negative,
    require_positive,
    require_within,
)

LOSSES = ("squared", "huber")
WEIGHT_PENALTIES = ("none", "l2", "l1")
REPLAY_KINDS = ("uniform", "prioritized")

#: Best fit of the architecture (:meth:`QNetLearner.fit_function_class`): full-batch Adam steps by
#: default, step size, and the seed of the initial weights.
FIT_STEPS = 2_000
FIT_LEARNING_RATE = 1e-3
FIT_SEED = 0


@dataclass
class QNetConfig:
    """Settings of :class:`QNetLearner` (plain fields, usable as a hydra structured config).

    Counts: ``warmup_steps``, ``update_every``, ``epsilon_horizon`` and ``importance_anneal_steps``
    are in environment steps (transitions received); ``target_update_every`` is in gradient updates.
    The ``priority_*`` and ``importance_*`` settings act only with ``replay_kind="prioritized"``.
    """

    hidden_sizes: list[int] = field(default_factory=lambda: [64, 64])  # ReLU MLP widths
    gamma: float = 0.99
    learning_rate: float = 1e-3  # Adam step size
    batch_size: int = 32
    replay_capacity: int = 100_000  # transitions
    warmup_steps: int = 500  # env steps before the first update
    update_every: int = 2  # env steps per gradient update
    target_update_every: int = 250  # updates between hard copies (used when polyak_tau == 0)
    polyak_tau: float = 0.0  # > 0: target <- tau * online + (1 - tau) * target after every update
    loss: str = "huber"  # "squared" (0.5 d^2) or "huber" (0.5 d^2 inside huber_delta, linear beyond)
    huber_delta: float = 1.0
    weight_penalty: str = "none"  # "none", "l2" (sum w^2) or "l1" (sum |w|) over weight matrices
    penalty_coef: float = 0.0
    double_estimator: bool = True  # Double DQN targets: online net picks, target net scores (van Hasselt 2010)
    n_step: int = 5  # chosen in results/qnet_tuning_dock, stage 3 (selection.md)
    epsilon: ScheduleConfig = field(default_factory=lambda: ScheduleConfig("linear", 1.0, 0.05, 5_000.0))  # env steps
    grad_clip_norm: float = 10.0  # 0 disables gradient-norm clipping
    torch_threads: int = 1
    scale_inputs: bool = True  # bounded observation dimensions onto [-1, 1] (unbounded ones: standardise_unbounded)
    standardise_unbounded: bool = False  # true: unbounded dimensions standardised too (results/qnet_tuning_cartpole)
    head: str = "plain"  # "plain" (one linear output per action) or "dueling" (Wang et al. 2016)
    replay_kind: str = "prioritized"  # "uniform" or "prioritized" (proportional, Schaul et al. 2016)
    priority_exponent: float = 0.6  # alpha: p_i = (|TD error| + priority_offset) ** alpha; 0 gives uniform
    priority_offset: float = 1e-6  # epsilon, keeps every slot drawable
    importance_exponent_start: float = 0.4  # beta at step 0, annealed linearly to 1
    importance_anneal_steps: int = 50_000  # env steps over which beta reaches 1

    def __post_init__(self) -> None:
        require_int_list("hidden_sizes", self.hidden_sizes, 1)
        require_gamma(self.gamma)
        require_positive("learning_rate", self.learning_rate)
        require_int("batch_size", self.batch_size, 1)
        require_int("replay_capacity", self.replay_capacity, 1)
        if self.replay_capacity < self.batch_size:
            raise ValueError(
                f"replay_capacity must be >= batch_size ({self.batch_size}), got {self.replay_capacity!r}"
            )
        require_int("warmup_steps", self.warmup_steps, 0)
        require_int("update_every", self.update_every, 1)
        require_int("target_update_every", self.target_update_every, 1)
        require_within("polyak_tau", self.polyak_tau, 0.0, 1.0)
        require_choice("loss", self.loss, LOSSES)
        require_positive("huber_delta", self.huber_delta)
        require_choice("weight_penalty", self.weight_penalty, WEIGHT_PENALTIES)
        require_non_negative("penalty_coef", self.penalty_coef)
        require_int("n_step", self.n_step, 1)
        check_epsilon("epsilon", self.epsilon)
        require_non_negative("grad_clip_norm", self.grad_clip_norm, note="(0 disables)")
        require_int("torch_threads", self.torch_threads, 1)
        for name in ("scale_inputs", "standardise_unbounded"):
            if not isinstance(getattr(self, name), bool):
                raise ValueError(f"{name} must be true or false, got {getattr(self, name)!r}")
        require_choice("head", self.head, HEADS)
        require_choice("replay_kind", self.replay_kind, REPLAY_KINDS)
        require_non_negative("priority_exponent", self.priority_exponent)
        require_positive("priority_offset", self.priority_offset)
        require_within("importance_exponent_start", self.importance_exponent_start, 0.0, 1.0)
        require_int("importance_anneal_steps", self.importance_anneal_steps, 1)


def bootstrap_values(q_online_next: torch.Tensor, q_target_next: torch.Tensor, double: bool) -> torch.Tensor:
    """Bootstrap value of each next state from ``(B, n_actions)`` Q estimates, shape ``(B,)``.

    ``double=False``: the single max estimator ``max_a Q_target(s', a)``, biased upwards when the
    estimates are noisy. ``double=True``: the double estimator, the target network's value of the
    online network's greedy action, ``Q_target(s', argmax_a Q_online(s', a))`` (van Hasselt 2010;
    van Hasselt, Guez & Silver 2016).
    """
    if not double:
        return q_target_next.max(dim=1).values
    choice = q_online_next.argmax(dim=1, keepdim=True)
    return q_target_next.gather(1, choice).squeeze(1)


def make_replay(config: QNetConfig, obs_dim: int) -> ReplayBuffer:
    """The replay memory ``config.replay_kind`` names, float32 observations."""
    if config.replay_kind == "prioritized":
        return PrioritizedReplay(config.replay_capacity, obs_dim, config.gamma, config.n_step,
                                 config.priority_exponent, config.priority_offset, obs_dtype=np.float32)
    return ReplayBuffer(config.replay_capacity, obs_dim, config.gamma, config.n_step, obs_dtype=np.float32)


class QNetLearner:
    """DQN-family learner for a ``Box`` observation space and a ``Discrete`` action space."""

    def __init__(
        self,
        observation_space: spaces.Space,
        action_space: spaces.Space,
        config: QNetConfig | None = None,
        seed: int = 0,
    ):
        if not isinstance(action_space, spaces.Discrete) or int(action_space.start) != 0:
            raise ValueError(f"action_space must be gymnasium Discrete(n) starting at 0, got {action_space!r}")
        if not isinstance(observation_space, spaces.Box) or len(observation_space.shape) != 1:
            raise ValueError(f"observation_space must be a 1-D gymnasium Box, got {observation_space!r}")
        self.config = config = QNetConfig() if config is None else config
        torch.set_num_threads(config.torch_threads)
        self.obs_dim = int(observation_space.shape[0])
        self.n_actions = int(action_space.n)
        self.epsilon = check_epsilon("epsilon", config.epsilon)
        self.rng = np.random.default_rng(seed)
        self.torch_generator = torch.Generator().manual_seed(int(seed))
        self._low, self._high = observation_space.low, observation_space.high
        self.scaler = InputScaler(self._low, self._high, config.standardise_unbounded) if config.scale_inputs else None
        self.online = build_qnet(self.obs_dim, config.hidden_sizes, self.n_actions, config.head, self.torch_generator)
        self.target = copy.deepcopy(self.online).requires_grad_(False)
        self.optimizer = torch.optim.Adam(self.online.parameters(), lr=config.learning_rate)
        self._weights = [m.weight for m in self.online.modules() if isinstance(m, nn.Linear)]
        self.replay = make_replay(config, self.obs_dim)
        self.importance_exponent = Schedule("linear", config.importance_exponent_start, 1.0,
                                            float(config.importance_anneal_steps))
        self.env_steps = 0
        self.updates = 0

    @classmethod
    def memory_bytes(cls, config: QNetConfig, observation_space: spaces.Space,
                     action_space: spaces.Space) -> tuple[int, str]:
        """Bytes of the replay memory (two float32 observations, action, reward and flags per slot; the sum
        tree of prioritized replay)."""
        obs_dim = int(np.prod(observation_space.shape or (1,)))
        n_bytes = int(config.replay_capacity) * (8 * obs_dim + 18)
        if config.replay_kind == "prioritized":
            n_bytes += SumTree.bytes_for(config.replay_capacity)
        return n_bytes, "replay_capacity"

    # --- optional capabilities (qlab.learners.protocol) -------------------------------------

    def fit_function_class(self, observations: np.ndarray, targets: np.ndarray, steps: int | None = None) -> np.ndarray:
        """The same architecture trained on ``targets`` ``(N, n_actions)`` at ``observations`` by full-batch Adam.

        Same head and same input scaling as the learner: bounded dimensions map onto [-1, 1] from
        the observation space; unbounded ones enter as they are or, with ``standardise_unbounded``,
        are standardised with the mean and variance of the ``observations`` being fitted (not the
        learner's running statistics). Mean squared error,
        ``steps`` steps (None: ``FIT_STEPS``) of step size ``FIT_LEARNING_RATE`` from initial
        weights seeded by ``FIT_SEED``, on one torch thread (the thread count is restored after).
        Depends on the config only, never on the learner's weights, statistics or seed; an upper
        bound of the best fit, as training need not reach the optimum.
        """
        steps = FIT_STEPS if steps is None else require_int("steps", steps, 1)
        threads = torch.get_num_threads()
        torch.set_num_threads(1)
        try:
            generator = torch.Generator().manual_seed(FIT_SEED)
            net = build_qnet(self.obs_dim, self.config.hidden_sizes, self.n_actions, self.config.head, generator)
            observations = np.asarray(observations, dtype=np.float32).reshape(-1, self.obs_dim)
            if self.config.scale_inputs:
                scaler = InputScaler(self._low, self._high, self.config.standardise_unbounded)
                scaler.update(observations)
                observations = scaler.transform(observations)
            x = torch.from_numpy(observations)
            y = torch.from_numpy(np.asarray(targets).astype(np.float32))
            optimizer = torch.optim.Adam(net.parameters(), lr=FIT_LEARNING_RATE)
            for _ in range(steps):
                optimizer.zero_grad(set_to_none=True)
                nn.functional.mse_loss(net(x), y).backward()
                optimizer.step()
            with torch.no_grad():
                return net(x).double().numpy()
        finally:
            torch.set_num_threads(threads)

    # --- acting ----------------------------------------------------------------------------

    def _inputs(self, obs: np.ndarray) -> torch.Tensor:
        """Network inputs ``(B, obs_dim)`` float32 of raw observations (scaled unless ``scale_inputs`` is off)."""
        obs = np.asarray(obs, dtype=np.float32).reshape(-1, self.obs_dim)
        return torch.from_numpy(obs if self.scaler is None else self.scaler.transform(obs))

    def _q(self, obs: np.ndarray) -> torch.Tensor:
        with torch.no_grad():
            return self.online(self._inputs(obs))

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Epsilon-greedy actions ``(B,)`` int64 for a batch ``(B, obs_dim)``; row ``j`` explores with epsilon
        at ``env_steps + j`` (the env steps its transition will be counted as; ties: lowest index)."""
        obs = np.asarray(obs, dtype=np.float32).reshape(-1, self.obs_dim)
        b = obs.shape[0]
        explore = self.rng.random(b) < np.asarray(self.epsilon(self.env_steps + np.arange(b)))
        action = np.empty(b, dtype=np.int64)
        action[explore] = self.rng.integers(self.n_actions, size=int(explore.sum()))
        if not explore.all():
            action[~explore] = self.greedy(obs[~explore])
        return action

    def greedy(self, obs: np.ndarray) -> np.ndarray:
        """Greedy actions for a batch ``(B, obs_dim)``, shape ``(B,)`` int64 (ties: lowest index)."""
        return self._q(obs).argmax(dim=1).numpy().astype(np.int64)

    def value(self, obs: np.ndarray) -> np.ndarray:
        """max_a Q(obs, a) for a batch, shape ``(B,)``."""
        return self._q(obs).max(dim=1).values.numpy().astype(np.float64)

    def q_values(self, obs: np.ndarray) -> np.ndarray:
        """Q(obs, a) for every action, shape ``(B, n_actions)``."""
        return self._q(obs).numpy().astype(np.float64)

    # --- learning --------------------------------------------------------------------------

    def learn(self, batch: Transitions) -> dict[str, float]:
        """Store the transitions and take the gradient updates now due; metrics of the last update.

        Returns ``{}`` when no update happened, else ``td_loss`` (importance-weighted with prioritized
        replay), ``penalty``, ``q_mean``, ``q_max``
        (of Q(s, a) on the minibatch), ``grad_norm`` (before clipping), ``epsilon``, ``updates``
        (total so far) and ``nonfinite`` (1.0 if the loss, Q or gradient were not finite; that
        update is then skipped and the run should be treated as diverged).
        """
        if self.scaler is not None:
            self.scaler.update(np.asarray(batch.obs, dtype=np.float32))  # as the replay stores them
        self.replay.add(batch)
        before = self.env_steps
        self.env_steps += len(batch)
        cfg = self.config
        due = self.env_steps // cfg.update_every - max(before, cfg.warmup_steps - 1) // cfg.update_every
        if self.env_steps < cfg.warmup_steps or len(self.replay) < cfg.batch_size or due <= 0:
            return {}
        metrics: dict[str, float] = {}
        for _ in range(due):
            metrics = self._update()
        metrics["epsilon"] = float(self.epsilon(self.env_steps))
        return metrics

    def _update(self) -> dict[str, float]:
        cfg = self.config
        sample = self.replay.sample(cfg.batch_size, self.rng)
        obs = self._inputs(sample.obs)
        next_obs = self._inputs(sample.next_obs)
        action = torch.from_numpy(sample.action).unsqueeze(1)
        with torch.no_grad():
            q_target_next = self.target(next_obs)
            q_online_next = self.online(next_obs) if cfg.double_estimator else q_target_next
            boot = bootstrap_values(q_online_next, q_target_next, cfg.double_estimator)
            y = torch.from_numpy(sample.reward).float() + torch.from_numpy(sample.discount).float() * boot
        q = self.online(obs).gather(1, action).squeeze(1)
        if cfg.loss == "huber":
            per_sample = nn.functional.huber_loss(q, y, reduction="none", delta=cfg.huber_delta)
        else:  # squared
            per_sample = 0.5 * (q - y).square()
        prioritized = isinstance(self.replay, PrioritizedReplay)
        if prioritized:
            beta = float(self.importance_exponent(self.env_steps))
            per_sample = per_sample * torch.from_numpy(self.replay.weights(sample.index, beta)).float()
        td_loss = per_sample.mean()
        if cfg.weight_penalty == "l2":
            penalty = sum(w.square().sum() for w in self._weights)
        elif cfg.weight_penalty == "l1":
            penalty = sum(w.abs().sum() for w in self._weights)
        else:
            penalty = torch.zeros(())
        self.optimizer.zero_grad(set_to_none=True)
        (td_loss + cfg.penalty_coef * penalty).backward()
        max_norm = cfg.grad_clip_norm if cfg.grad_clip_norm > 0 else float("inf")
        grad_norm = nn.utils.clip_grad_norm_(self.online.parameters(), max_norm)
        stats = torch.stack([td_loss.detach(), penalty.detach(), q.detach().mean(), q.detach().max(), grad_norm])
        td, pen, q_mean, q_max, norm = stats.tolist()
        nonfinite = not np.isfinite([td, pen, q_mean, q_max, norm]).all()
        if not nonfinite:
            self.optimizer.step()
            self.updates += 1
            self._follow_target()
            if prioritized:
                self.replay.set_priorities(sample.index, (y - q.detach()).double().numpy())
        return {
            "td_loss": td,
            "penalty": pen,
            "q_mean": q_mean,
            "q_max": q_max,
            "grad_norm": norm,
            "updates": float(self.updates),
            "nonfinite": float(nonfinite),
        }

    def _follow_target(self) -> None:
        tau = self.config.polyak_tau
        if tau > 0:
            with torch.no_grad():
                for target_param, online_param in zip(self.target.parameters(), self.online.parameters(), strict=True):
                    target_param.lerp_(online_param, tau)
        elif self.updates % self.config.target_update_every == 0:
            self.target.load_state_dict(self.online.state_dict())

    # --- checkpoints -----------------------------------------------------------------------

    def state_dict(self) -> dict[str, Any]:
        """Copies of everything needed to resume exactly (networks, Adam, counters, RNGs, replay)."""
        opt = self.optimizer.state_dict()
        return {
            "online": {k: v.detach().clone() for k, v in self.online.state_dict().items()},
            "target": {k: v.detach().clone() for k, v in self.target.state_dict().items()},
            "optimizer": {
                "state": {str(i): {k: v.clone() for k, v in s.items()} for i, s in opt["state"].items()},
                "param_groups": [{k: list(v) if isinstance(v, tuple) else v for k, v in g.items()}
                                 for g in opt["param_groups"]],
            },
            "counters": {"env_steps": self.env_steps, "updates": self.updates},
            "rng": {"numpy": self.rng.bit_generator.state, "torch": self.torch_generator.get_state()},
            "replay": self.replay.state_dict(),
            "scaler": None if self.scaler is None else self.scaler.state_dict(),
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore a state from :meth:`state_dict` (directly or after a checkpoint round trip).

        ``ValueError`` when the state does not fit this config: input-scaler statistics missing while
        ``scale_inputs`` is on (or present while it is off), or priorities missing for prioritized replay.
        """
        saved_scaler = state.get("scaler")
        if (saved_scaler is None) != (self.scaler is None):
            raise ValueError(
                f"learner state {'has no' if saved_scaler is None else 'has'} input-scaler statistics ('scaler') "
                f"but this learner has scale_inputs={self.scaler is not None}"
            )
        self.online.load_state_dict(state["online"])
        self.target.load_state_dict(state["target"])
        opt = state["optimizer"]
        self.optimizer.load_state_dict({
            "state": {int(i): dict(s) for i, s in opt["state"].items()},
            "param_groups": [{k: tuple(v) if k == "betas" else v for k, v in g.items()} for g in opt["param_groups"]],
        })
        self.env_steps = int(state["counters"]["env_steps"])
        self.updates = int(state["counters"]["updates"])
        self.rng.bit_generator.state = state["rng"]["numpy"]
        self.torch_generator.set_state(state["rng"]["torch"])
        self.replay.load_state_dict(state["replay"])
        if self.scaler is not None:
            self.scaler.load_state_dict(saved_scaler)
