"""Dock physics against closed forms, scipy's ODE solver and the task's own definition."""

import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from hypothesis import given
from hypothesis import strategies as st
from scipy.integrate import solve_ivp

from qlab.tasks.dock import Dock

MASS_KG = 2000.0
C1 = 80.0  # linear drag, N/(m/s)
C2 = 60.0  # quadratic drag, N/(m/s)^2


def run_steps(task: Dock, state: np.ndarray, thrust_N: np.ndarray, n_steps: int) -> np.ndarray:
    """States after each of ``n_steps`` steps under constant thrust, shape ``(n_steps, N, 2)``."""
    rng = np.random.default_rng(0)
    control = np.asarray(thrust_N, dtype=np.float64).reshape(-1, 1)
    out = []
    for _ in range(n_steps):
        state = task.batch_step(state, control, rng).next_state
        out.append(state)
    return np.array(out)


def linear_drag_closed_form(x0: float, v0: float, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    # Closed form of m dv/dt = -c v, dx/dt = v: v = v0 exp(-c t / m), x = x0 + v0 m / c (1 - exp(-c t / m)).
    decay = np.exp(-C1 * t_s / MASS_KG)
    return x0 + v0 * MASS_KG / C1 * (1.0 - decay), v0 * decay


def test_zero_thrust_linear_drag_decays_exponentially():
    task = Dock(quadratic_drag_N_s2_per_m2=0.0, substeps=64)
    traj = run_steps(task, np.array([[-100.0, 2.0]]), np.zeros(1), 20)
    t_s = np.arange(1, 21) * task.dt_s
    x_ref, v_ref = linear_drag_closed_form(-100.0, 2.0, t_s)
    h_s = task.dt_s / task.substeps
    # First-order method: velocity error about (c/m)^2 h t / 2 relative (< 3e-4 here); the position
    # lags by about h times the speed change plus that drift, well inside h * v0.
    np.testing.assert_allclose(traj[:, 0, 1], v_ref, rtol=1e-3)
    np.testing.assert_allclose(traj[:, 0, 0], x_ref, rtol=0, atol=h_s * 2.0)


def test_semi_implicit_euler_converges_at_first_order():
    # Closed-form solution of m dv/dt = -c v as reference; semi-implicit Euler is a first-order method
    # (Hairer, Lubich & Wanner, Geometric Numerical Integration, Thm. 3.3 for symplectic Euler).
    x_ref, v_ref = linear_drag_closed_form(-100.0, 2.0, np.array([20.0]))
    errors_v, errors_x = [], []
    for substeps in (4, 8, 16, 32):
        task = Dock(quadratic_drag_N_s2_per_m2=0.0, dt_s=2.0, substeps=substeps)
        final = run_steps(task, np.array([[-100.0, 2.0]]), np.zeros(1), 10)[-1, 0]
        errors_x.append(abs(final[0] - x_ref[0]))
        errors_v.append(abs(final[1] - v_ref[0]))
    order_v = np.log2(np.array(errors_v[:-1]) / np.array(errors_v[1:]))
    order_x = np.log2(np.array(errors_x[:-1]) / np.array(errors_x[1:]))
    np.testing.assert_allclose(order_v, 1.0, atol=0.05)
    np.testing.assert_allclose(order_x, 1.0, atol=0.05)


def test_full_drag_model_matches_solve_ivp():
    task = Dock(action_kind="continuous", substeps=500)
    start = np.array([[-100.0, 0.0], [-100.0, 2.5], [-60.0, -1.0]])
    thrust_N = np.array([800.0, -400.0, 250.0])  # the second crosses v = 0, where v|v| changes sign
    n_steps = 25
    traj = run_steps(task, start, thrust_N, n_steps)
    h_s = task.dt_s / task.substeps
    t_eval = np.arange(1, n_steps + 1) * task.dt_s
    for i in range(start.shape[0]):

        def rhs(_t, y, u=thrust_N[i]):
            return [y[1], (u - C1 * y[1] - C2 * y[1] * abs(y[1])) / MASS_KG]

        # scipy.integrate.solve_ivp (DOP853, tight tolerances) as the reference solution.
        ref = solve_ivp(rhs, (0.0, t_eval[-1]), start[i], method="DOP853", t_eval=t_eval, rtol=1e-11, atol=1e-12)
        # First-order method with h = 2 ms: velocity error ~1e-4 m/s; position error of order h times
        # the speeds involved (a few mm).
        np.testing.assert_allclose(traj[:, i, 1], ref.y[1], rtol=0, atol=2e-4)
        np.testing.assert_allclose(traj[:, i, 0], ref.y[0], rtol=0, atol=2 * h_s * task.terminal_speed_m_s)


def test_terminal_speed_solves_thrust_drag_balance():
    # Quadratic formula for c1 v + c2 v^2 = F (handbook algebra).
    task = Dock()
    v = (-C1 + np.sqrt(C1**2 + 4 * C2 * 800.0)) / (2 * C2)
    assert task.terminal_speed_m_s == pytest.approx(v, rel=1e-12)
    # Full thrust for long enough settles on it (closed form above as the check value).
    traj = run_steps(
        Dock(action_kind="continuous", start_distance_m=(400, 400)), np.array([[-400.0, 0.0]]), np.array([800.0]), 120
    )
    assert traj[-1, 0, 1] == pytest.approx(v, rel=1e-6)


def step_once(task: Dock, state, thrust_N: float):
    return task.batch_step(np.array([state], dtype=float), np.array([[thrust_N]]), np.random.default_rng(0))


def test_slow_touch_stops_against_quay_without_failure():
    # Task definition (design notes, Tasks: Dock): touching the quay slower than the contact speed is no failure.
    task = Dock()
    quay = task.quay_position_m
    out = step_once(task, [quay - 0.01, 0.2], 0.0)
    assert not out.terminated[0] and not out.success[0] and out.base_reward[0] == 0.0
    np.testing.assert_array_equal(out.next_state[0], [quay, 0.0])
    # Thrust into the wall keeps the vessel pinned there.
    out = step_once(task, [quay, 0.0], 800.0)
    assert not out.terminated[0]
    np.testing.assert_array_equal(out.next_state[0], [quay, 0.0])


def test_fast_strike_on_quay_fails():
    task = Dock()
    out = step_once(task, [task.quay_position_m - 0.5, 1.0], 0.0)
    assert out.terminated[0] and not out.success[0] and out.base_reward[0] == 0.0
    assert out.next_state[0, 0] == task.quay_position_m
    assert out.next_state[0, 1] > task.contact_speed_m_s


def test_strike_inside_a_step_fails_although_the_end_of_step_speed_is_low():
    task = Dock()
    quay, contact = task.quay_position_m, task.contact_speed_m_s
    x0, v0, u = quay - 0.12, 0.5, -800.0

    def rhs(_t, y):
        return [y[1], (u - C1 * y[1] - C2 * y[1] * abs(y[1])) / MASS_KG]

    def reach_quay(_t, y):
        return y[0] - quay

    # scipy.integrate.solve_ivp with an event: the exact trajectory reaches the quay within the step,
    # faster than the contact speed, while its speed at the end of the step is below the contact speed.
    ref = solve_ivp(rhs, (0.0, task.dt_s), [x0, v0], events=reach_quay, rtol=1e-11, atol=1e-12)
    assert ref.t_events[0].size == 1 and 0 < ref.t_events[0][0] < task.dt_s
    assert ref.y_events[0][0, 1] > contact
    assert 0 < ref.y[1, -1] < contact
    out = step_once(task, [x0, v0], u)
    assert out.terminated[0] and not out.success[0]


def test_success_needs_berth_and_low_speed():
    # Task definition (design notes, Tasks: Dock): success = inside the berth and slower than the contact speed.
    task = Dock()
    slow_inside = step_once(task, [0.5, 0.1], 0.0)
    assert slow_inside.success[0] and slow_inside.terminated[0] and slow_inside.base_reward[0] == 1.0
    fast_inside = step_once(task, [-0.5, 0.5], 0.0)
    assert abs(fast_inside.next_state[0, 0]) <= task.berth_half_length_m
    assert not fast_inside.terminated[0] and fast_inside.base_reward[0] == 0.0
    slow_outside = step_once(task, [-3.0, 0.1], 0.0)
    assert not slow_outside.terminated[0] and slow_outside.base_reward[0] == 0.0
    # The same through the gymnasium interface.
    task.reset(seed=0)
    task.set_state(np.array([0.5, 0.1]))
    _, reward, terminated, truncated, info = task.step(2)  # level 2 of 5: zero thrust
    assert (reward, terminated, truncated, info["success"]) == (1.0, True, False, True)


def test_leaving_the_channel_fails():
    task = Dock()
    out = step_once(task, [task.channel_end_m + 0.5, -2.0], 0.0)
    assert out.terminated[0] and not out.success[0] and out.base_reward[0] == 0.0
    assert task.observation_space.contains(task.observe(out.next_state)[0])


@pytest.mark.parametrize(
    ("params", "name"),
    [
        ({"mass_kg": 0.0}, "mass_kg"),
        ({"mass_kg": -5.0}, "mass_kg"),
        ({"dt_s": 0.0}, "dt_s"),
        ({"substeps": 0}, "substeps"),
        ({"substeps": 2.5}, "substeps"),
        ({"mass_kg": 10.0}, "substeps"),  # sub-step far too long for the drag on a light hull
        ({"start_distance_m": (120.0, 80.0)}, "start_distance_m"),
        ({"start_distance_m": (0.5, 10.0)}, "start_distance_m"),
        ({"start_distance_m": (10.0, np.inf)}, "start_distance_m"),
        ({"action_kind": "analogue"}, "action_kind"),
        ({"n_levels": 1}, "n_levels"),
        ({"linear_drag_N_s_per_m": 0.0, "quadratic_drag_N_s2_per_m2": 0.0}, "drag"),
        ({"velocity_noise_m_s": -0.1}, "velocity_noise_m_s"),
        ({"contact_speed_m_s": 0.0}, "contact_speed_m_s"),
        ({"max_steps": 0}, "max_steps"),
    ],
)
def test_bad_parameters_raise_value_error_naming_them(params, name):
    with pytest.raises(ValueError, match=name):
        Dock(**params)


@given(
    position=st.floats(0.0, 1.0),
    velocity=st.floats(-1.0, 1.0),
    thrust=st.floats(-1.0, 1.0),
    noise=st.sampled_from([0.0, 0.5, 5.0]),
    seed=st.integers(0, 2**16),
)
def test_next_state_and_observation_stay_inside_the_bounds(position, velocity, thrust, noise, seed):
    # Box bounds are the task's own claim; checked with gymnasium's Box.contains.
    task = Dock(action_kind="continuous", velocity_noise_m_s=noise)
    lo, hi = task.state_low, task.state_high
    state = np.array([[lo[0] + position * (hi[0] - lo[0]), velocity * hi[1]]])
    out = task.batch_step(state, np.array([[thrust * task.max_thrust_N]]), np.random.default_rng(seed))
    assert np.all(out.next_state >= lo) and np.all(out.next_state <= hi)
    assert task.observation_space.contains(task.observe(out.next_state)[0])


def test_observation_of_the_exact_bounds_is_inside_the_space():
    task = Dock()
    corners = np.array([task.state_low, task.state_high, [task.state_low[0], task.state_high[1]]])
    obs = task.observe(corners)
    assert obs.dtype == np.float32
    assert all(task.observation_space.contains(o) for o in obs)


def test_velocity_noise_has_the_requested_spread():
    # Linear drag only: one step maps a velocity kick k to k (1 - h c / m)^substeps exactly, so the
    # sample standard deviation of N Gaussian kicks is sigma times that factor, within about
    # sigma / sqrt(2 N) (sampling distribution of a normal standard deviation).
    sigma, n = 0.2, 20000
    task = Dock(quadratic_drag_N_s2_per_m2=0.0, velocity_noise_m_s=sigma)
    state = np.tile([-100.0, 0.0], (n, 1))
    out = task.batch_step(state, np.zeros((n, 1)), np.random.default_rng(3))
    factor = (1 - task.dt_s / task.substeps * C1 / MASS_KG) ** task.substeps
    assert np.std(out.next_state[:, 1]) == pytest.approx(sigma * factor, abs=4 * sigma / np.sqrt(2 * n))


def test_discrete_levels_match_the_same_continuous_thrust():
    discrete, continuous = Dock(), Dock(action_kind="continuous")
    np.testing.assert_allclose(discrete.control_levels[:, 0], [-800.0, -400.0, 0.0, 400.0, 800.0])
    state = np.array([[-50.0, 1.0]] * 5)
    a = discrete.batch_step(state, discrete.controls(np.arange(5)), np.random.default_rng(0))
    b = continuous.batch_step(state, continuous.controls(discrete.control_levels), np.random.default_rng(0))
    np.testing.assert_array_equal(a.next_state, b.next_state)


def test_potential_and_goal_distance():
    task = Dock()
    obs = task.observe(np.array([[0.3, 0.0], [-31.0, 0.0], [task.quay_position_m, 0.0]]))
    np.testing.assert_allclose(task.goal_distance(obs), [0.0, 30.0, 1.5], rtol=1e-6)
    np.testing.assert_allclose(task.potential(obs), [1.0, np.exp(-1.0), np.exp(-1.5 / 30.0)], rtol=1e-6)


@pytest.mark.parametrize("action_kind", ["discrete", "continuous"])
def test_gymnasium_env_checker(action_kind):
    # gymnasium.utils.env_checker.check_env: the reference checker of the Env API.
    check_env(Dock(action_kind=action_kind), skip_render_check=True)


def test_random_policy_succeeds_rarely():
    # Smoke check of the default scenario (common practice, no source): a delayed-feedback task is
    # useful only if random exploration finds the goal rarely but not never; the bounds are loose
    # on purpose and carry no calibration value.
    task = Dock()
    n = 2000
    rng = np.random.default_rng(7)
    state = task.sample_start(n, rng)
    live = np.ones(n, dtype=bool)
    success = np.zeros(n, dtype=bool)
    for _ in range(task.max_steps):
        out = task.batch_step(state, task.controls(rng.integers(0, task.action_space.n, size=n)), rng)
        success |= live & out.success
        live &= ~out.terminated
        state = out.next_state
    assert 0.002 < success.mean() < 0.1


def test_start_states_are_at_rest_within_the_start_range():
    # Task definition (design notes, Tasks: Dock / Calibration): start 80-120 m out, at rest.
    task = Dock()
    start = task.sample_start(500, np.random.default_rng(1))
    assert np.all(start[:, 1] == 0.0)
    assert np.all((-start[:, 0] >= 80.0) & (-start[:, 0] <= 120.0))
    assert np.ptp(start[:, 0]) > 35.0  # spread over the range, not a single point


# --- fixed channel ------------------------------------------------------------------------------


def test_default_channel_end_follows_the_farthest_start():
    # Today's rule kept: x_end = -(start_distance_m[1] + channel_margin_m) = -(25 + 30) = -55 m and -(50 + 30) = -80 m.
    assert Dock(start_distance_m=(15.0, 25.0)).channel_end_m == -55.0
    assert Dock(start_distance_m=(40.0, 50.0)).channel_end_m == -80.0


def test_fixed_channel_end_and_observation_box_do_not_depend_on_the_start_range():
    tasks = [Dock(start_distance_m=r, channel_length_m=55.0, dead_time_steps=1) for r in [(5.0, 10.0), (15.0, 25.0),
                                                                                           (40.0, 55.0)]]
    assert {t.channel_end_m for t in tasks} == {-55.0}
    for t in tasks[1:]:
        np.testing.assert_array_equal(t.observation_space.low, tasks[0].observation_space.low)
        np.testing.assert_array_equal(t.observation_space.high, tasks[0].observation_space.high)
    assert tasks[0].observation_space.low[0] == -55.0
    # with the default rule the box of the 15-25 m start is the same 55 m channel: the fixed one reproduces it
    np.testing.assert_array_equal(Dock(start_distance_m=(15.0, 25.0)).observation_space.low,
                                  Dock(start_distance_m=(15.0, 25.0), channel_length_m=55.0).observation_space.low)


def test_start_beyond_the_fixed_channel_is_refused():
    with pytest.raises(ValueError, match=r"start_distance_m=\[40.0, 60.0\] must lie within channel_length_m=55.0"):
        Dock(start_distance_m=(40.0, 60.0), channel_length_m=55.0)
    with pytest.raises(ValueError, match="channel_length_m"):
        Dock(channel_length_m=0.0)


def test_leaving_the_fixed_channel_fails_at_its_end():
    # Backing at 1 m/s from 54.9 m out: past x_end = -55 m within the step, clamped there and failed.
    task = Dock(start_distance_m=(15.0, 25.0), channel_length_m=55.0)
    out = task.batch_step(np.array([[-54.9, -1.0]]), np.zeros((1, 1)), np.random.default_rng(0))
    assert out.terminated[0] and not out.success[0]
    assert out.next_state[0, 0] == -55.0
