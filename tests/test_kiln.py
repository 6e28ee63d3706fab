"""Kiln task: dead-time step response, exact integration, batch scoring, observation options."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from hypothesis import given
from hypothesis import strategies as st
from scipy.integrate import solve_ivp

import qlab  # noqa: F401  (registers the gymnasium ids)
from qlab.tasks.batch import TaskBatch
from qlab.tasks.kiln import Kiln


def _start_state(task: Kiln, temp_degC: float) -> np.ndarray:
    """One cold kiln at ``temp_degC``, schedule step 0, burner off."""
    state = np.zeros((1, 4 + task.dead_time_steps))
    state[0, 1] = temp_degC
    return state


def _rollout_temperatures(task: Kiln, state: np.ndarray, powers: np.ndarray) -> np.ndarray:
    """Temperatures T[0..len(powers)] under the given sequence of burner commands (one copy)."""
    rng = np.random.default_rng(0)
    temps = [state[0, 1]]
    for u in powers:
        state = task.batch_step(state, np.array([[u]]), rng).next_state
        temps.append(state[0, 1])
    return np.array(temps)


@pytest.mark.parametrize(("dead_time_steps", "power"), [(0, 1.0), (1, 0.5), (4, 1.0), (7, 0.8)])
def test_step_response_after_dead_time_is_first_order_lag(dead_time_steps: int, power: float) -> None:
    task = Kiln(dead_time_steps=dead_time_steps, action_kind="continuous")
    t0 = task.ambient_degC
    n_steps = 40
    temps = _rollout_temperatures(task, _start_state(task, t0), np.full(n_steps, power))
    # Nothing moves while the command is still in the dead-time queue (kiln at ambient, burner off).
    assert np.all(temps[: dead_time_steps + 1] == t0)
    # First-order system step response T(t) = T_ss + (T0 - T_ss) exp(-(t - t_dead) / tau), delayed by
    # the dead time; any control textbook, e.g. Ogata, Modern Control Engineering, first-order systems
    # (from memory). T_ss = T_amb + gain * tau * u is the steady state of dT/dt = (T_amb - T)/tau + gain u.
    t_ss = task.ambient_degC + task.heating_rate_degC_per_s * task.time_constant_s * power
    t_s = np.arange(n_steps + 1) * task.dt_s
    late = t_s >= dead_time_steps * task.dt_s
    expected = t_ss + (t0 - t_ss) * np.exp(-(t_s[late] - dead_time_steps * task.dt_s) / task.time_constant_s)
    np.testing.assert_allclose(temps[late], expected, rtol=1e-12)


def test_piecewise_constant_commands_match_ode_solver() -> None:
    task = Kiln(dead_time_steps=2, action_kind="continuous", start_temperature_degC=(300.0, 300.0))
    powers = np.random.default_rng(3).uniform(0.0, 1.0, size=25)
    temps = _rollout_temperatures(task, _start_state(task, 300.0), powers)
    applied = np.concatenate([np.zeros(task.dead_time_steps), powers])[: powers.size]
    gain, tau, amb = task.heating_rate_degC_per_s, task.time_constant_s, task.ambient_degC
    # Reference: scipy.integrate.solve_ivp on dT/dt = (T_amb - T)/tau + gain u, u held over each step.
    ref = [300.0]
    for u in applied:
        sol = solve_ivp(lambda _t, y, u=u: (amb - y) / tau + gain * u, (0.0, task.dt_s), [ref[-1]],
                        rtol=1e-11, atol=1e-9)
        ref.append(sol.y[0, -1])
    np.testing.assert_allclose(temps, ref, rtol=1e-8)


def test_end_of_schedule_is_terminated_not_truncated() -> None:
    env = Kiln()
    env.reset(seed=1)
    assert env.max_steps > env.schedule_steps
    flags = []
    for _ in range(env.schedule_steps):
        _, _, terminated, truncated, _ = env.step(2)
        flags.append((terminated, truncated))
    assert flags[-1] == (True, False)
    assert all(f == (False, False) for f in flags[:-1])

    batch = TaskBatch(Kiln(), n=3)
    batch.reset(None, [2, 3, 4])
    for k in range(batch.task.schedule_steps):
        tr = batch.step(np.full(3, 2))
        assert np.all(tr.terminated == (k == batch.task.schedule_steps - 1))
        assert not tr.truncated.any()


def _scripted_action(task: Kiln, obs: np.ndarray) -> int:
    """Rule-based controller from the documented physics and schedule, reading only the observation.

    It predicts the temperature once the pending commands have acted, then picks the burner level
    whose next temperature stays within the ramp limit and lands closest to the schedule's
    setpoint: the band centre while ramping and soaking, then falling at half the ramp limit.
    """
    decay = np.exp(-task.dt_s / task.time_constant_s)
    rise = task.heating_rate_degC_per_s * task.time_constant_s
    temp = float(obs[1])
    for u in obs[4:]:
        steady = task.ambient_degC + rise * float(u)
        temp = steady + (temp - steady) * decay
    acting_at = round(float(obs[0]) * task.schedule_steps) + task.dead_time_steps
    centre = 0.5 * sum(task.soak_band_degC)
    cooling_for = max(0, acting_at - task.ramp_steps - task.soak_steps)
    setpoint = centre - cooling_for * 0.5 * task.ramp_limit_degC_per_h * task.dt_s / 3600.0
    steady = task.ambient_degC + rise * task.control_levels[:, 0]
    nxt = steady + (temp - steady) * decay
    allowed = np.abs(nxt - temp) <= task.ramp_limit_degC_per_h * task.dt_s / 3600.0
    return int(np.argmin(np.where(allowed, np.abs(nxt - setpoint), np.inf)))


def _run_episode(env: Kiln, policy, seed: int) -> tuple[list[float], dict]:
    obs, _ = env.reset(seed=seed)
    rewards, done, info = [], False, {}
    while not done:
        obs, reward, terminated, truncated, info = env.step(policy(obs))
        rewards.append(reward)
        done = terminated or truncated
    return rewards, info


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_scripted_controller_fires_a_good_batch(seed: int) -> None:
    env = Kiln(allowed_ramp_violations=0)
    rewards, info = _run_episode(env, lambda obs: _scripted_action(env, obs), seed)
    assert len(rewards) == env.schedule_steps
    assert rewards[-1] == 1.0 and sum(rewards) == 1.0
    assert info["success"] and info["base_reward"] == 1.0
    assert env.state[3] == 0  # no ramp-limit violation at all
    assert env.state[2] >= env.required_soak_steps


def test_burner_off_gives_a_bad_batch() -> None:
    env = Kiln()
    rewards, info = _run_episode(env, lambda obs: 0, seed=0)
    assert len(rewards) == env.schedule_steps
    assert sum(rewards) == 0.0 and not info["success"]
    assert env.state[2] == 0


def test_too_many_ramp_violations_spoil_a_soaked_batch() -> None:
    # Full power heats a cold kiln by (T_ss - T) (1 - exp(-dt/tau)) ~ 59 degC per step, over the 25 degC
    # limit; the kiln then reaches this wide band and soaks long enough, yet the batch is spoilt.
    env = Kiln(allowed_ramp_violations=0, soak_band_degC=(1180.0, 1519.0))
    rewards, info = _run_episode(env, lambda obs: 4, seed=0)
    assert env.state[2] >= env.required_soak_steps
    assert env.state[3] > 0
    assert rewards[-1] == 0.0 and not info["success"]


def test_soak_counts_only_steps_ending_inside_the_band() -> None:
    # Full power runs through the band towards 1,520 degC: only the steps that end inside it soak.
    env = Kiln(allowed_ramp_violations=1000, start_temperature_degC=(20.0, 20.0))
    rewards, _ = _run_episode(env, lambda obs: 4, seed=0)
    # Delayed first-order step response (as above) at the end of every step k = 1..schedule_steps.
    t_ss = env.ambient_degC + env.heating_rate_degC_per_s * env.time_constant_s
    k = np.arange(1, env.schedule_steps + 1)
    acting_s = np.maximum(0, k - env.dead_time_steps) * env.dt_s
    temps = t_ss + (20.0 - t_ss) * np.exp(-acting_s / env.time_constant_s)
    lo, hi = env.soak_band_degC
    expected = np.count_nonzero((temps >= lo) & (temps <= hi))
    assert 0 < expected < env.required_soak_steps
    assert env.state[2] == expected
    assert rewards[-1] == 0.0


def test_hiding_pending_commands_changes_only_the_observation() -> None:
    full, hidden = Kiln(temperature_noise_degC=2.0), Kiln(temperature_noise_degC=2.0, observe_pending=False)
    obs_f, _ = full.reset(seed=5)
    obs_h, _ = hidden.reset(seed=5)
    assert full.observation_space.shape == (4 + full.dead_time_steps,)
    assert hidden.observation_space.shape == (4,)
    actions = np.random.default_rng(7).integers(0, 5, size=full.schedule_steps)
    for a in actions:
        np.testing.assert_array_equal(obs_f[:4], obs_h)
        np.testing.assert_array_equal(full.state, hidden.state)
        obs_f, r_f, term_f, _, info_f = full.step(a)
        obs_h, r_h, term_h, _, info_h = hidden.step(a)
        assert (r_f, term_f, info_f) == (r_h, term_h, info_h)
    assert term_f


def test_batched_step_equals_one_copy_at_a_time() -> None:
    task = Kiln(action_kind="continuous")
    rng = np.random.default_rng(11)
    state = task.sample_start(6, rng)
    state[:, 4:] = rng.uniform(0.0, 1.0, size=(6, task.dead_time_steps))
    control = rng.uniform(0.0, 1.0, size=(6, 1))
    together = task.batch_step(state, control, rng).next_state
    apart = np.vstack([task.batch_step(state[i : i + 1], control[i : i + 1], rng).next_state for i in range(6)])
    np.testing.assert_array_equal(together, apart)


@pytest.mark.parametrize(
    "params",
    [
        {},
        {"action_kind": "continuous"},
        {"observe_pending": False, "temperature_noise_degC": 5.0},
        {"dead_time_steps": 0, "n_levels": 3},
    ],
)
def test_gymnasium_env_checker(params: dict) -> None:
    check_env(Kiln(**params), skip_render_check=True)  # gymnasium.utils.env_checker.check_env


def test_registered_id_with_potential_shaping() -> None:
    env = gym.make("qlab/Kiln-v0", shaping="potential", gamma=0.99, dead_time_steps=2)
    obs, _ = env.reset(seed=0)
    assert obs.shape == (6,)
    env.close()


@given(
    seed=st.integers(0, 2**16),
    noise=st.floats(0.0, 50.0),
    dead_time_steps=st.integers(0, 6),
    observe_pending=st.booleans(),
)
def test_observations_stay_inside_the_space(seed: int, noise: float, dead_time_steps: int,
                                            observe_pending: bool) -> None:
    task = Kiln(temperature_noise_degC=noise, dead_time_steps=dead_time_steps, observe_pending=observe_pending,
                action_kind="continuous")
    rng = np.random.default_rng(seed)
    state = task.sample_start(8, rng)
    space = task.observation_space
    for _ in range(task.schedule_steps):
        obs = task.observe(state)
        assert obs.dtype == np.float32
        assert np.all((obs >= space.low) & (obs <= space.high))
        phi, dist = task.potential(obs), task.goal_distance(obs)
        assert np.all((phi >= 0.0) & (phi <= 1.0)) and np.all(dist >= 0.0)
        state = task.batch_step(state, task.controls(rng.uniform(-0.5, 1.5, size=(8, 1))), rng).next_state
    assert np.all((task.observe(state) >= space.low) & (task.observe(state) <= space.high))


def test_potential_and_goal_distance_follow_the_documented_rule() -> None:
    task = Kiln()
    state = np.zeros((4, 4 + task.dead_time_steps))
    state[:, 0] = 60  # schedule step
    state[:, 1] = [1200.0, 1200.0, task.ambient_degC, 1200.0]  # degC
    state[:, 2] = [task.required_soak_steps, 0, 0, task.required_soak_steps]
    state[:, 3] = [0, 0, 0, task.allowed_ramp_violations + 1]
    obs = task.observe(state)
    phi = task.potential(obs)
    # Soak complete: Phi = 1, d = 0. In band, nothing soaked: Phi = 0.5, d = required soak time (h).
    # Cold kiln: Phi = 0, d = soak time + (band low - ambient) / ramp limit. Too many violations: Phi = 0.
    np.testing.assert_allclose(phi, [1.0, 0.5, 0.0, 0.0], atol=1e-12)
    gap_h = (task.soak_band_degC[0] - task.ambient_degC) / task.ramp_limit_degC_per_h
    np.testing.assert_allclose(task.goal_distance(obs)[:3], [0.0, 2.0, 2.0 + gap_h], rtol=1e-12)
    # Too little schedule left to finish the soak: the batch cannot be good any more.
    late = state[1:2].copy()
    late[0, 0] = task.schedule_steps - task.required_soak_steps + 1
    assert task.potential(task.observe(late))[0] == 0.0


@pytest.mark.parametrize(
    ("params", "name"),
    [
        ({"dt_s": 0.0}, "dt_s"),
        ({"dt_s": -60.0}, "dt_s"),
        ({"time_constant_s": 0.0}, "time_constant_s"),
        ({"time_constant_s": float("nan")}, "time_constant_s"),
        ({"heating_rate_degC_per_s": -1.0}, "heating_rate_degC_per_s"),
        ({"dead_time_steps": -1}, "dead_time_steps"),
        ({"dead_time_steps": 2.5}, "dead_time_steps"),
        ({"action_kind": "analog"}, "action_kind"),
        ({"n_levels": 1}, "n_levels"),
        ({"soak_band_degC": (1220.0, 1180.0)}, "soak_band_degC"),
        ({"soak_band_degC": (1200.0, 1200.0)}, "soak_band_degC"),
        ({"soak_band_degC": (1500.0, 1600.0)}, "soak_band_degC"),
        ({"soak_band_degC": (10.0, 100.0)}, "soak_band_degC"),
        ({"ramp_limit_degC_per_h": 0.0}, "ramp_limit_degC_per_h"),
        ({"allowed_ramp_violations": -1}, "allowed_ramp_violations"),
        ({"required_soak_h": 0.0}, "required_soak_h"),
        ({"required_soak_h": 100.0}, "required_soak_h"),
        ({"ramp_steps": 0}, "ramp_steps"),
        ({"temperature_noise_degC": -0.1}, "temperature_noise_degC"),
        ({"start_temperature_degC": (40.0, 20.0)}, "start_temperature_degC"),
        ({"ambient_degC": -300.0}, "ambient_degC"),
    ],
)
def test_bad_parameters_raise_value_error_naming_them(params: dict, name: str) -> None:
    with pytest.raises(ValueError, match=name):
        Kiln(**params)
