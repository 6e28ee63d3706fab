"""Dead time in Dock and Crane: a pure delay of the command, the pending commands in the observation,
the look-ahead potential, and learner sizes that bin the pending commands at their levels."""

from __future__ import annotations

from collections.abc import Callable

import gymnasium as gym
import numpy as np
import pytest
from runtools import compose_run

import qlab  # noqa: F401  (registers the gymnasium ids)
from qlab.config import to_container
from qlab.reference.dock_grid import DockGrid
from qlab.runspec import build_run
from qlab.tasks import TaskBatch
from qlab.tasks.base import ControlTask, MeanDraws
from qlab.tasks.crane import Crane
from qlab.tasks.dock import Dock
from qlab.tasks.kiln import Kiln

#: task maker and a start of its plant at rest (Dock 40 m out; Crane's load hanging still)
PLANTS: dict[str, tuple[Callable[..., ControlTask], list[float]]] = {
    "dock": (Dock, [-40.0, 0.0]),
    "crane": (Crane, [5.0, 0.0, 0.0, 0.0]),
}


def plant_path(task: ControlTask, plant: list[float], actions: np.ndarray, seed: int = 0) -> np.ndarray:
    """Plant states (without the pending commands) before and after each action, one copy, nothing pending at first."""
    state = np.zeros((1, len(plant) + task.dead_time_steps))
    state[0, : len(plant)] = plant
    rng = np.random.default_rng(seed)
    path = [state[0, : len(plant)]]
    for a in actions:
        state = task.batch_step(state, task.controls(np.array([a])), rng).next_state
        path.append(state[0, : len(plant)])
    return np.array(path)


@pytest.mark.parametrize("name", list(PLANTS))
@pytest.mark.parametrize("dead_time_steps", [1, 2, 3])
def test_step_command_moves_the_plant_exactly_dead_time_steps_later(name, dead_time_steps):
    # A dead time of T is the pure delay e^{-sT} of control textbooks (Franklin, Powell & Emami-Naeini,
    # "Feedback Control of Dynamic Systems", from memory): the delayed output is y(t - T). A plant at rest
    # under zero control stays at rest, so under a step command given at time 0 (full thrust or force, the
    # top level, from step 0 on) the delayed plant stands still for dead_time_steps steps and then repeats
    # the undelayed plant's path shifted by dead_time_steps steps, bit for bit.
    make, plant = PLANTS[name]
    n = 10
    step_command = np.full(n, 4)  # level 4 of 5: +max_thrust_N / +max_force_N
    delayed = plant_path(make(dead_time_steps=dead_time_steps), plant, step_command)
    prompt = plant_path(make(), plant, step_command)
    assert np.all(delayed[: dead_time_steps + 1] == plant)
    assert np.any(prompt[1] != plant)  # the undelayed plant moves at once
    np.testing.assert_array_equal(delayed[dead_time_steps:], prompt[: n + 1 - dead_time_steps])


@pytest.mark.parametrize(("name", "noise"), [("dock", {"velocity_noise_m_s": 0.05}),
                                             ("crane", {"force_noise_N": 100.0})])
def test_delayed_plant_is_the_prompt_plant_fed_zeros_first(name, noise):
    # The same pure delay under any command sequence, noise included: the delayed plant under u[0..n) is the
    # undelayed plant under d zero commands followed by u[0..n-d) (zero thrust/force is level 2 of 5).
    make, plant = PLANTS[name]
    d = 2
    actions = np.random.default_rng(4).integers(0, 5, size=12)
    delayed = plant_path(make(dead_time_steps=d, **noise), plant, actions, seed=9)
    prompt = plant_path(make(**noise), plant, np.concatenate([np.full(d, 2), actions[:-d]]), seed=9)
    np.testing.assert_array_equal(delayed, prompt)


@pytest.mark.parametrize(("make", "plant_dim", "top"), [(Dock, 2, 800.0), (Crane, 4, 2000.0)])
def test_pending_commands_are_observed_oldest_first(make, plant_dim, top):
    task = make(dead_time_steps=3)
    space = task.observation_space
    assert space.shape == (plant_dim + 3,)
    assert np.all(space.low[plant_dim:] == -top) and np.all(space.high[plant_dim:] == top)
    obs, _ = task.reset(seed=1)
    assert np.all(obs[plant_dim:] == 0.0)  # nothing pending at reset: zero thrust/force
    # 5 levels from -top to +top: level k is -top + k * top / 2, so actions 4, 0, 3, 1 give +top, -top,
    # +top/2, -top/2; the queue shifts left by one each step.
    expected = [[0, 0, top], [0, top, -top], [top, -top, top / 2], [-top, top / 2, -top / 2]]
    for action, pending in zip([4, 0, 3, 1], expected, strict=True):
        obs, *_ = task.step(action)
        np.testing.assert_array_equal(obs[plant_dim:], np.array(pending, dtype=np.float32))


def test_continuous_commands_are_pending_as_clipped():
    task = Dock(dead_time_steps=1, action_kind="continuous")
    task.reset(seed=0)
    obs, *_ = task.step(np.array([1e6], dtype=np.float32))
    assert obs[2] == 800.0  # clipped to max_thrust_N before it waits


def test_zero_control_must_be_a_level_and_dead_time_a_count():
    with pytest.raises(ValueError, match=r"dead_time_steps=1 .* control 0, which must be one of the 4 levels: .*odd"):
        Dock(dead_time_steps=1, n_levels=4)
    with pytest.raises(ValueError, match="dead_time_steps"):
        Crane(dead_time_steps=-1)
    Dock(dead_time_steps=1, n_levels=4, action_kind="continuous")  # any thrust may wait
    Crane(dead_time_steps=2, n_levels=7)


# --- the look-ahead potential -------------------------------------------------------------------


def test_potential_ahead_is_the_potential_without_dead_time():
    for task in (Dock(velocity_noise_m_s=0.05), Crane(force_noise_N=50.0), Kiln(observe_pending=False)):
        obs = task.observe(task.sample_start(20, np.random.default_rng(2)))
        obs = obs + np.random.default_rng(3).normal(0.0, 0.5, obs.shape).astype(np.float32)
        np.testing.assert_array_equal(task.potential_ahead(obs), task.potential(obs))


@pytest.mark.parametrize(("noisy", "quiet", "state"), [
    (Dock(dead_time_steps=2, velocity_noise_m_s=0.05), Dock(dead_time_steps=2), [-30.0, 1.5, 800.0, -400.0]),
    (Crane(dead_time_steps=3, force_noise_N=100.0), Crane(dead_time_steps=3), [6.0, 0.5, 0.02, -0.1, 2e3, 0.0, -1e3]),
    (Kiln(dead_time_steps=3, temperature_noise_degC=2.0), Kiln(dead_time_steps=3), [40.0, 1100.0, 3.0, 1.0, 1, 0.5, 0]),
])
def test_potential_ahead_is_phi_after_the_pending_commands_act_noise_free(noisy, quiet, state):
    # The definition, by another path: the same task without noise, placed in the observed state and stepped
    # once per pending command by gymnasium's step (the command given meanwhile acts only later).
    obs = noisy.observe(np.array([state]))
    quiet.set_state(noisy.state_from_observation(obs)[0])
    for _ in range(noisy.dead_time_steps):
        after, _, terminated, _, _ = quiet.step(0)
        assert not terminated
    assert noisy.potential_ahead(obs)[0] == quiet.potential(after[None])[0]
    assert noisy.potential_ahead(obs)[0] != noisy.potential(obs)[0]


def test_potential_ahead_of_a_predicted_failure_is_zero():
    # In the berth (|x| = 0.9 m <= 1 m, so Phi = 1) at 2 m/s towards the quay 1.5 m past its edge (x = 2.5 m),
    # full thrust pending: within the first 1 s step the vessel covers about 2 m (0.9 + 2 = 2.9 > 2.5) and
    # reaches the quay at about 2 m/s, faster than the 0.25 m/s contact speed, so the prediction strikes the
    # quay: Phi = 0, the failure terminal's potential.
    task = Dock(dead_time_steps=2)
    obs = task.observe(np.array([[0.9, 2.0, 800.0, 800.0]]))
    assert task.potential(obs)[0] == 1.0
    assert task.potential_ahead(obs)[0] == 0.0


def test_potential_ahead_credits_a_command_when_given():
    # At rest 20 m out with nothing pending, full thrust given: the vessel does not move for 2 steps, so Phi
    # stays, while the look-ahead already sees the thrust act in the second predicted step and rises.
    task = Dock(dead_time_steps=2)
    obs0 = task.set_state(np.array([-20.0, 0.0, 0.0, 0.0]))
    obs1, *_ = task.step(4)
    assert task.potential(obs1[None])[0] == task.potential(obs0[None])[0]
    assert task.potential_ahead(obs1[None])[0] > task.potential_ahead(obs0[None])[0]


def test_mean_draws_return_the_means():
    draws = MeanDraws()
    np.testing.assert_array_equal(draws.standard_normal((3, 2)), np.zeros((3, 2)))
    np.testing.assert_array_equal(draws.normal(1.5, 2.0, size=(3,)), np.full(3, 1.5))
    np.testing.assert_array_equal(draws.uniform(1.0, 4.0, size=(2,)), np.full(2, 2.5))


@pytest.mark.parametrize(("task_id", "params"), [
    ("qlab/Dock-v0", {"dead_time_steps": 2, "velocity_noise_m_s": 0.05, "start_distance_m": (3.0, 8.0),
                      "max_steps": 15}),
    ("qlab/Crane-v0", {"dead_time_steps": 3, "force_noise_N": 100.0, "max_steps": 15}),
])
def test_batched_look_ahead_shaping_equals_single_environments(task_id, params):
    # gymnasium's ShapedReward wrapper on single environments against TaskBatch, copy by copy, bit for bit
    n, gamma = 4, 0.97
    batch = TaskBatch(gym.make(task_id, **params).unwrapped, n, shaping="potential_ahead", gamma=gamma)
    singles = [gym.make(task_id, shaping="potential_ahead", gamma=gamma, **params) for _ in range(n)]
    rng = np.random.default_rng(6)
    ended = np.ones(n, dtype=bool)
    for _ in range(60):
        seeds = rng.integers(0, 2**31, int(ended.sum()))
        batch.reset(ended, seeds)
        for i, s in zip(np.flatnonzero(ended), seeds, strict=True):
            singles[i].reset(seed=int(s))
        actions = rng.integers(0, 5, size=n)
        step = batch.step(actions)
        for i in range(n):
            obs, reward, terminated, truncated, _ = singles[i].step(actions[i])
            np.testing.assert_array_equal(step.next_obs[i], obs)
            assert (step.reward[i], step.terminated[i], step.truncated[i]) == (reward, terminated, truncated)
        ended = step.terminated | step.truncated
    assert np.any(step.reward != step.base_reward)


def test_kiln_hiding_its_pending_commands_refuses_the_look_ahead():
    assert Kiln(observe_pending=False).observation_levels() == [0, 0, 0, 0]
    with pytest.raises(ValueError, match=r"shaping must be one of \['none', 'potential', 'progress'\]"):
        gym.make("qlab/Kiln-v0", shaping="potential_ahead", observe_pending=False)


def test_kiln_state_from_observation_recovers_counts_and_queue():
    task = Kiln(temperature_noise_degC=2.0)
    rng = np.random.default_rng(8)
    state = task.sample_start(5, rng)
    for _ in range(90):
        state = task.batch_step(state, task.controls(rng.integers(0, 5, 5)), rng).next_state
    back = task.state_from_observation(task.observe(state))
    np.testing.assert_array_equal(back[:, [0, 2, 3]], state[:, [0, 2, 3]])  # whole steps, soak steps, violations
    np.testing.assert_array_equal(back[:, 4:], state[:, 4:])  # pending levels are exact in float32
    np.testing.assert_allclose(back[:, 1], state[:, 1], rtol=1e-7)  # temperature through float32


def test_dock_grid_model_refuses_dead_time():
    with pytest.raises(ValueError, match="dead_time_steps must be 0"):
        DockGrid(Dock(dead_time_steps=1), 5, 5)


# --- learner sizes ----------------------------------------------------------------------------------


def test_dock_table_bins_pending_thrusts_at_their_levels():
    # table_bins [40] on position and velocity, one cell per thrust level (5) on each of the 2 pending thrusts:
    # 40 * 40 * 5 * 5 = 40,000 cells (not 40^4 = 2,560,000), 5 actions, 16 bytes each: 3.2 MB
    _, _, learner = build_run(compose_run(["task.dead_time_steps=2"]))
    assert learner.features.bins.tolist() == [40, 40, 5, 5]
    assert learner.table.shape == (40_000, 5)
    _, _, tiles = build_run(compose_run(["task.dead_time_steps=2", "learner=linear"]))
    assert tiles.features.bins.tolist() == [8, 8, 5, 5]
    continuous = compose_run(["task.dead_time_steps=2", "task.action_kind=continuous", "learner=linear"])
    assert to_container(continuous.learner)["bins"] == [8]  # continuous thrusts wait at any value: 8 for all


def test_delayed_dock_table_stays_within_the_size_check():
    # dead time 3: 40 * 40 * 5^3 = 200,000 cells * 5 actions * 16 bytes = 16,000,000 bytes = 15.3 MiB
    build_run(compose_run(["task.dead_time_steps=3"]))  # well inside the default max_learner_mib=2048
    with pytest.raises(ValueError, match=r"would need 15\.3 MiB .*bins: bins=\[40, 40, 5, 5, 5\]"):
        build_run(compose_run(["task.dead_time_steps=3", "max_learner_mib=15"]))
