"""Figures of merit against responses whose figures are known by hand.

Sources: the first-order step response ``1 - exp(-t/tau)`` (10 % at ``tau ln(10/9)``, 90 % at
``tau ln 10``, so rise time ``tau ln 9``; within 2 % after ``tau ln 50``; no overshoot); the
underdamped second-order step response, peak overshoot ``exp(-zeta pi / sqrt(1 - zeta^2))``
(both standard results of control engineering, common practice); the geometric series for the
sampled integral absolute error.
"""

from __future__ import annotations

import numpy as np

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.evaluation.performance import loop_performance
from service.solver.evaluation.simulation import Event, Scenario, simulate_loop

TAU = 2.5
H = 1e-3 * TAU  # fine sampling: linear interpolation between samples is then exact to ~1e-6


def _first_order(step_at: int, total: int, r0: float, r1: float):
    t = np.arange(total) * H
    y = np.full(total, r0)
    since = t[step_at:] - t[step_at]
    y[step_at:] = r0 + (r1 - r0) * (1.0 - np.exp(-since / TAU))
    r = np.full(total, r0)
    r[step_at:] = r1
    return t, y, r


def test_first_order_step_figures_by_hand():
    total, s = 30001, 1000
    t, y, r = _first_order(s, total, r0=0.5, r1=-1.5)  # a downward step of size 2
    perf = loop_performance(t, y[:, None], r[:, None], np.zeros((total, 1)), initial_input=[0.0])
    f = perf.outputs[0]
    assert f.step == s
    np.testing.assert_allclose(f.rise_time, TAU * np.log(9.0), rtol=1e-5)
    np.testing.assert_allclose(f.settling_time, TAU * np.log(50.0), rtol=1e-5)
    assert f.overshoot == 0.0
    # IAE = sum_k 2 exp(-k H / tau) H over the window: a geometric series.
    q = np.exp(-H / TAU)
    n = total - s
    np.testing.assert_allclose(f.integral_absolute_error, 2.0 * H * (1 - q**n) / (1 - q), rtol=1e-12)
    np.testing.assert_allclose(f.final_offset, r[-1] - y[-1], rtol=1e-12)
    assert abs(f.final_offset) < 2 * np.exp(-(n - 1) * H / TAU) * 1.0001


def test_underdamped_second_order_overshoot_by_formula():
    zeta, wn = 0.3, 2.0
    t = np.arange(20001) * 1e-3
    wd = wn * np.sqrt(1 - zeta**2)
    phi = np.arccos(zeta)
    y = 1 - np.exp(-zeta * wn * t) * np.sin(wd * t + phi) / np.sqrt(1 - zeta**2)
    perf = loop_performance(
        t, y[:, None], np.ones((t.size, 1)), np.zeros((t.size, 1)), initial_input=[0.0], initial_setpoint=[0.0]
    )
    expected = 100 * np.exp(-zeta * np.pi / np.sqrt(1 - zeta**2))
    np.testing.assert_allclose(perf.outputs[0].overshoot, expected, rtol=1e-5)
    # The decay envelope exp(-zeta wn t)/sqrt(1 - zeta^2) enters the 2 % band at
    # t = ln(50 / sqrt(1 - zeta^2)) / (zeta wn); the last exit of the oscillation itself lies at most one
    # half period pi/wd before that (its peaks come every half period; common practice).
    envelope = np.log(50 / np.sqrt(1 - zeta**2)) / (zeta * wn)
    assert envelope - np.pi / wd <= perf.outputs[0].settling_time <= envelope


def test_the_last_setpoint_change_is_the_one_measured():
    total = 30001
    t, y, r = _first_order(20000, total, r0=1.0, r1=2.0)
    y[:20000] = np.linspace(0.0, 1.0, 20000)  # a ramp before: must not count
    r[:5000] = 0.0
    perf = loop_performance(t, y[:, None], r[:, None], np.zeros((total, 1)), initial_input=[0.0])
    assert perf.outputs[0].step == 20000
    np.testing.assert_allclose(perf.outputs[0].rise_time, TAU * np.log(9.0), rtol=1e-5)


def test_no_setpoint_change_gives_none_for_step_figures():
    t = np.arange(10.0)
    y = np.array([0.0, 0.1, 0.3, 0.2, 0.0, -0.1, 0.0, 0.0, 0.0, 0.05])
    perf = loop_performance(t, y[:, None], np.zeros((10, 1)), np.zeros((10, 1)), initial_input=[0.0])
    f = perf.outputs[0]
    assert (f.step, f.rise_time, f.settling_time, f.overshoot) == (None, None, None, None)
    np.testing.assert_allclose(f.integral_absolute_error, np.abs(y).sum())  # whole run, h = 1
    np.testing.assert_allclose(f.final_offset, -0.05)


def test_a_response_that_never_gets_there_has_no_rise_or_settling_time():
    t = np.arange(100.0)
    y = 0.5 * (1 - 0.9**t)  # stops at half the step
    perf = loop_performance(
        t, y[:, None], np.ones((100, 1)), np.zeros((100, 1)), initial_input=[0.0], initial_setpoint=[0.0]
    )
    f = perf.outputs[0]
    assert f.rise_time is None and f.settling_time is None and f.overshoot == 0.0
    np.testing.assert_allclose(f.final_offset, 1 - y[-1])


def test_input_moves_by_hand_and_non_finite_figures_are_none():
    u = np.array([[1.0, 0.0], [1.5, -1.0], [0.5, -1.0], [np.nan, np.nan]])
    y = np.array([[0.0], [0.5], [np.nan], [np.nan]])
    perf = loop_performance(np.arange(4.0), y, np.ones((4, 1)), u, initial_input=[0.5, 0.0], initial_setpoint=[0.0])
    assert perf.inputs[0].total_move is None and perf.inputs[0].largest_move is None
    u = u[:3]
    perf = loop_performance(np.arange(3.0), np.zeros((3, 1)), np.zeros((3, 1)), u, initial_input=[0.5, 0.0])
    # moves u1: 0.5, 0.5, -1.0 ; u2: 0, -1, 0
    assert perf.inputs[0].total_move == 2.0 and perf.inputs[0].largest_move == 1.0
    assert perf.inputs[1].total_move == 1.0 and perf.inputs[1].largest_move == 1.0
    f = loop_performance(
        np.arange(4.0), y, np.ones((4, 1)), np.zeros((4, 1)), initial_input=[0.0], initial_setpoint=[0.0]
    ).outputs[0]
    assert f.integral_absolute_error is None and f.final_offset is None and f.settling_time is None
    assert f.overshoot is None


def test_figures_of_a_simulated_first_order_loop():
    # x+ = a x + (1 - a) u with the state measured: a one-step horizon with no move weight
    # puts y on the setpoint in one step (du = Kh E, G = 1 - a), so the response is a step of
    # one sample: rise time 0.8 sample (10 % -> 90 % interpolated on the jump), no overshoot.
    a = 0.8
    d = design_controller([[a]], [[1 - a]], [[1.0]], output_weight=[1.0], move_weight=[0.0], prediction=1, control=1)
    sim = simulate_loop(
        d,
        design_estimator([[a]], [[1 - a]], [[1.0]], kind="full_state"),
        Scenario(steps=20, setpoint_changes=[Event(3, np.array([1.0]))], sample_time=0.5),
    )
    perf = loop_performance(
        sim.time,
        sim.outputs,
        sim.setpoints,
        sim.inputs,
        initial_input=sim.initial_input,
        initial_setpoint=sim.initial_setpoint,
    )
    f = perf.outputs[0]
    np.testing.assert_allclose(sim.outputs[4:, 0], 1.0, atol=1e-12)
    np.testing.assert_allclose(f.rise_time, 0.8 * 0.5, rtol=1e-12)
    np.testing.assert_allclose(f.settling_time, 0.98 * 0.5, rtol=1e-12)
    assert f.overshoot < 1e-10
    np.testing.assert_allclose(f.integral_absolute_error, 0.5, rtol=1e-12)  # one sample of error 1
    assert abs(f.final_offset) < 1e-12
