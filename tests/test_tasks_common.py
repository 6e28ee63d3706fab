"""Behaviour every qlab task shares: gymnasium's checker, seeding, batching, shaping."""

import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from hypothesis import given
from hypothesis import strategies as st

import qlab  # noqa: F401  (registers the tasks)
from qlab.returns import discounted_return
from qlab.tasks import TASK_IDS, TaskBatch

# Small physical variations per task (bounded so episodes stay short and physical).
PARAMS = {
    "qlab/Dock-v0": st.fixed_dictionaries(
        {"mass_kg": st.floats(500.0, 5000.0), "velocity_noise_m_s": st.sampled_from([0.0, 0.05]),
         "start_distance_m": st.sampled_from([(5.0, 10.0), (20.0, 40.0)]),
         "channel_length_m": st.sampled_from([None, 45.0]), "dead_time_steps": st.integers(0, 3),
         "action_kind": st.sampled_from(["discrete", "continuous"])}
    ),
    "qlab/Kiln-v0": st.fixed_dictionaries(
        {"dead_time_steps": st.integers(0, 6), "observe_pending": st.booleans(),
         "temperature_noise_degC": st.sampled_from([0.0, 2.0])}
    ),
    "qlab/Crane-v0": st.fixed_dictionaries(
        {"mass_load_kg": st.floats(200.0, 2000.0), "rope_length_m": st.floats(2.0, 8.0),
         "lock_trolley": st.booleans(), "force_noise_N": st.sampled_from([0.0, 100.0]),
         "dead_time_steps": st.integers(0, 3)}
    ),
    "qlab/LinearQuadratic-v0": st.fixed_dictionaries(
        {"dt_s": st.floats(0.05, 0.2), "action_kind": st.sampled_from(["continuous", "discrete"]),
         "noise_cov": st.sampled_from([None, [[1e-3, 0.0], [0.0, 1e-3]]])}
    ),
}
SHAPED = [(task_id, variant) for task_id in TASK_IDS for variant in ("none", "potential", "potential_ahead", "progress")
          if task_id != "qlab/LinearQuadratic-v0" or variant == "none"]
#: the new settings of Dock and Crane, each checked by gymnasium's checker under every variant
DEAD_TIME_SETTINGS = [
    ("qlab/Dock-v0", {"dead_time_steps": 2}),
    ("qlab/Dock-v0", {"dead_time_steps": 3, "action_kind": "continuous", "velocity_noise_m_s": 0.05}),
    ("qlab/Dock-v0", {"channel_length_m": 55.0, "start_distance_m": (15.0, 25.0), "dead_time_steps": 1}),
    ("qlab/Crane-v0", {"dead_time_steps": 2, "force_noise_N": 100.0}),
    ("qlab/Crane-v0", {"dead_time_steps": 1, "action_kind": "continuous"}),
]


def rollout(env: gym.Env, seed: int, actions: list[int]) -> list[tuple]:
    """Observations, rewards and flags of a trajectory under a fixed action sequence."""
    obs, _ = env.reset(seed=seed)
    env.action_space.seed(seed)
    trace = [(obs.copy(),)]
    for i in range(len(actions)):
        a = actions[i] % env.action_space.n if isinstance(env.action_space, gym.spaces.Discrete) \
            else env.action_space.sample()
        obs, reward, terminated, truncated, info = env.step(a)
        trace.append((obs.copy(), reward, terminated, truncated, info["success"], info["base_reward"]))
        if terminated or truncated:
            break
    return trace


@pytest.mark.parametrize(("task_id", "variant", "params"),
                         [(t, v, {}) for t, v in SHAPED]
                         + [(t, v, p) for t, p in DEAD_TIME_SETTINGS for v in ("none", "potential", "potential_ahead")])
def test_gymnasium_env_checker_passes(task_id, variant, params):
    # gymnasium.utils.env_checker.check_env: gymnasium's own API conformance checks
    env = gym.make(task_id, shaping=variant, gamma=0.99, **params).unwrapped if variant == "none" else \
        gym.make(task_id, shaping=variant, gamma=0.99, **params)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.filterwarnings("ignore", message=".*is different from the unwrapped version.*")
        warnings.filterwarnings("ignore", message=".*we recommend using a symmetric and normalized space.*")
        if task_id == "qlab/LinearQuadratic-v0":  # its state is unbounded by design
            warnings.filterwarnings("ignore", message=".*infinity. This is probably too.*")
        check_env(env, skip_render_check=True)


@pytest.mark.parametrize("task_id", list(TASK_IDS))
def test_unknown_or_inapplicable_shaping_is_refused(task_id):
    with pytest.raises(ValueError, match="shaping must be one of"):
        gym.make(task_id, shaping="bonus")
    if task_id == "qlab/LinearQuadratic-v0":
        with pytest.raises(ValueError, match=r"\['none'\]"):
            gym.make(task_id, shaping="potential")


@pytest.mark.parametrize("task_id", list(TASK_IDS))
@given(data=st.data(), seed=st.integers(0, 2**31 - 1), actions=st.lists(st.integers(0, 1000), max_size=80))
def test_observations_inside_space_and_seeded(task_id, data, seed, actions):
    params = data.draw(PARAMS[task_id])
    env = gym.make(task_id, **params).unwrapped
    first = rollout(env, seed, actions)
    for step in first:
        assert np.all(np.isfinite(step[0]))
        assert env.observation_space.contains(step[0])
    second = rollout(env, seed, actions)
    assert len(first) == len(second)
    for a, b in zip(first, second, strict=True):
        np.testing.assert_array_equal(a[0], b[0])
        assert a[1:] == b[1:]


@pytest.mark.parametrize("task_id", list(TASK_IDS))
@given(data=st.data(), seed=st.integers(0, 2**31 - 1), n=st.integers(1, 6))
def test_batch_copies_repeat_seeded_single_envs(task_id, data, seed, n):
    # gymnasium Env.reset(seed=s) then step(a1), step(a2), ...: copy i of a batch reset with seed s and given the
    # same actions repeats it, noise included, while other copies sit out steps or start new episodes
    params = data.draw(PARAMS[task_id])
    batch = TaskBatch(gym.make(task_id, **params).unwrapped, n)
    singles = [gym.make(task_id, **params) for _ in range(n)]
    rng = np.random.default_rng(seed)
    # LinearQuadratic multiplies matrices: BLAS sums N rows in another order than one row (last-bit differences)
    exact = task_id != "qlab/LinearQuadratic-v0"
    which = np.ones(n, dtype=bool)
    for _ in range(25):
        if which.any():
            seeds = rng.integers(0, 2**31, int(which.sum()))
            obs = batch.reset(which, seeds)
            for i, s in zip(np.flatnonzero(which), seeds, strict=True):
                np.testing.assert_array_equal(obs[i], singles[i].reset(seed=int(s))[0])
        active = ~batch.done & (rng.random(n) < 0.7)  # some copies sit out this step
        if active.any():
            space = batch.action_space
            actions = rng.integers(0, space.n, size=n) if isinstance(space, gym.spaces.Discrete) else \
                rng.uniform(space.low, space.high, size=(n, *space.shape)).astype(np.float32)
            step = batch.step(actions[active], active)
            for k, i in enumerate(np.flatnonzero(active)):
                obs, reward, terminated, truncated, info = singles[i].step(actions[i])
                if exact:
                    np.testing.assert_array_equal(step.next_obs[k], obs)
                    assert step.base_reward[k] == reward
                else:
                    np.testing.assert_allclose(step.next_obs[k], obs, rtol=1e-6)
                    assert step.base_reward[k] == pytest.approx(reward, rel=1e-12, abs=1e-15)
                assert step.reward[k] == step.base_reward[k]  # shaping "none"
                assert (step.terminated[k], step.truncated[k], step.success[k]) == (
                    terminated, truncated, info["success"])
        which = batch.done & (rng.random(n) < 0.5)  # some ended copies start a new episode


def shaped_episode(task_id: str, gamma: float, seed: int, policy_seed: int, variant: str = "potential",
                   **params) -> tuple:
    """Shaped and base discounted returns of one episode, with the variant's Phi at its first and last observations."""
    env = gym.make(task_id, shaping=variant, gamma=gamma, **params)
    task = env.unwrapped
    phi = task.potential if variant == "potential" else task.potential_ahead
    rng = np.random.default_rng(policy_seed)
    obs, _ = env.reset(seed=seed)
    phi0 = phi(obs[None])[0]
    shaped, base = [], []
    done = False
    while not done:
        obs, reward, terminated, truncated, info = env.step(int(rng.integers(task.action_space.n)))
        shaped.append(reward)
        base.append(info["base_reward"])
        done = terminated or truncated
    return (discounted_return(np.array(shaped), gamma), discounted_return(np.array(base), gamma), phi0,
            phi(obs[None])[0], len(shaped), terminated)


@pytest.mark.parametrize(("task_id", "variant", "dead_time_steps"), [
    ("qlab/Dock-v0", "potential", 0), ("qlab/Crane-v0", "potential", 0), ("qlab/Kiln-v0", "potential", 4),
    ("qlab/Dock-v0", "potential", 2), ("qlab/Dock-v0", "potential_ahead", 2), ("qlab/Crane-v0", "potential_ahead", 2),
    ("qlab/Kiln-v0", "potential_ahead", 4),
])
def test_potential_shaping_telescopes(task_id, variant, dead_time_steps):
    # Ng, Harada & Russell (1999): sum_t gamma^t F_t = gamma^T Phi(s_T) - Phi(s_0), Phi(s_T) = 0 if terminal
    gamma = 0.97
    seen = set()
    for seed in range(40):
        params = {"max_steps": 30} if task_id != "qlab/Kiln-v0" else {}
        if task_id == "qlab/Dock-v0":
            params["start_distance_m"] = (3.0, 6.0)
        g_shaped, g_base, phi0, phi_end, steps, terminated = shaped_episode(
            task_id, gamma, seed, seed, variant, dead_time_steps=dead_time_steps, **params)
        tail = 0.0 if terminated else gamma**steps * phi_end
        assert g_shaped == pytest.approx(g_base - phi0 + tail, abs=1e-9)
        seen.add(bool(terminated))
    assert seen == {True, False} or task_id == "qlab/Kiln-v0"  # both endings were exercised


def test_info_base_reward_is_the_tasks_own_under_every_variant():
    rewards = {}
    for variant in ("none", "potential", "potential_ahead", "progress"):
        env = gym.make("qlab/Dock-v0", shaping=variant, start_distance_m=(3.0, 6.0), dead_time_steps=1)
        env.reset(seed=5)
        rewards[variant] = [env.step(4)[4]["base_reward"] for _ in range(5)]
    assert rewards["none"] == rewards["potential"] == rewards["potential_ahead"] == rewards["progress"]
