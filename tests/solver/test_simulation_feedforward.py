"""Simulation with measured disturbances, a true plant of another state count, many events.

Sources: the control law of the design notes with its feed-forward term,
``du(k) = Kr r - Kx x(k) - Ku u(k-1) - Kd d(k)``, applied in a loop written here; the
offset-free conditions of Muske and Badgwell 2002 and Pannocchia and Rawlings 2003 (with
``nd = p`` disturbances and a stable loop the outputs settle on the setpoint under any
mismatch, a wrong dead time included); the definition of a held event ("the value of the last
event at or before step k") written out naively.
"""

from __future__ import annotations

import numpy as np

from service.solver.design.controller import design_controller
from service.solver.design.feedforward import disturbance_free_response, feedforward_gain
from service.solver.estimation.estimator import design_estimator
from service.solver.evaluation.simulation import Event, Scenario, TruePlant, simulate_loop

# An invented two-by-two process with one measured disturbance (not from any publication).
A = np.array([[0.9, 0.05], [0.0, 0.8]])
B = np.array([[0.1, 0.02], [0.03, 0.2]])
C = np.eye(2)
BD = np.array([[0.04], [-0.03]])


def _design():
    return design_controller(A, B, C, output_weight=[1.0, 1.0], move_weight=[0.1, 0.1], prediction=20, control=3)


def test_full_state_feed_forward_applies_kd_by_hand():
    d = _design()
    kd = feedforward_gain(d.gain.horizon, disturbance_free_response(A, BD, C, prediction=20))
    scenario = Scenario(
        steps=120,
        setpoint_changes=[Event(5, np.array([1.0, -0.5]))],
        measured_disturbances=[Event(30, np.array([2.0])), Event(80, np.array([-1.0]))],
        initial_state=np.array([0.1, 0.0]),
    )
    sim = simulate_loop(d, design_estimator(A, B, C, kind="full_state"), scenario, b_disturbance=BD)
    kr, kx, ku = d.gain.setpoint, d.gain.state, d.gain.previous_input
    x, u, dm = scenario.initial_state.copy(), np.zeros(2), np.zeros(1)
    inputs = []
    for k in range(scenario.steps):
        dm = {30: np.array([2.0]), 80: np.array([-1.0])}.get(k, dm)
        u = u + kr @ sim.setpoints[k] - kx @ x - ku @ u - kd @ dm
        inputs.append(u)
        x = A @ x + B @ u + BD @ dm
    np.testing.assert_allclose(sim.inputs, np.array(inputs), rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(sim.measured_disturbances[29:31, 0], [0.0, 2.0])


def test_feed_forward_with_an_estimator_under_mismatch_stays_offset_free():
    d = _design()
    est = design_estimator(A, B, C, kind="output_disturbance")
    true = TruePlant(A * 1.02, B * 1.2, C, BD * 1.5)
    scenario = Scenario(
        steps=600,
        setpoint_changes=[Event(5, np.array([1.0, -0.5]))],
        measured_disturbances=[Event(200, np.array([3.0]))],
    )
    sim = simulate_loop(d, est, scenario, plant=true, b_disturbance=BD)
    assert sim.diverged_at is None
    assert np.abs(sim.outputs[-1] - sim.setpoints[-1]).max() < 1e-6
    # Feed-forward acts before the outputs move (common practice): the same disturbance, not
    # fed forward (the model's Bd zero, the true plant's unchanged), moves them further.
    unmeasured = simulate_loop(d, est, scenario, plant=true, b_disturbance=np.zeros((2, 1)))
    assert np.abs(unmeasured.outputs[-1] - unmeasured.setpoints[-1]).max() < 1e-6
    after = slice(200, 300)
    peak = np.abs(sim.outputs[after] - sim.setpoints[after]).max()
    assert peak < 0.5 * np.abs(unmeasured.outputs[after] - unmeasured.setpoints[after]).max()


def test_a_true_plant_with_one_more_sample_of_dead_time_is_still_offset_free():
    # The true plant delays both inputs by one more sample: states [x; u(k-1)], nt = n + m.
    nt = 4
    at = np.zeros((nt, nt))
    at[:2, :2], at[:2, 2:] = A, 1.1 * B
    bt = np.vstack([np.zeros((2, 2)), np.eye(2)])
    ct = np.hstack([C, np.zeros((2, 2))])
    d = _design()
    scenario = Scenario(
        steps=800,
        setpoint_changes=[Event(5, np.array([1.0, -0.5]))],
        output_disturbances=[Event(300, np.array([0.2, 0.1]))],
    )
    sim = simulate_loop(d, design_estimator(A, B, C), scenario, plant=TruePlant(at, bt, ct))
    assert sim.diverged_at is None and sim.states.shape == (800, nt)
    assert np.abs(sim.outputs[-1] - sim.setpoints[-1]).max() < 1e-6
    np.testing.assert_array_equal(sim.states[0], np.zeros(nt))


def test_many_events_hold_as_the_naive_definition_says(rng):
    steps = 300
    events = [Event(int(s), rng.normal(size=2)) for s in rng.integers(0, steps, size=500)]
    d = _design()
    sim = simulate_loop(d, design_estimator(A, B, C), Scenario(steps=steps, output_disturbances=events))
    expected = np.zeros((steps, 2))
    for k in range(steps):
        at_or_before = [e for e in events if e.step <= k]
        if at_or_before:
            last = max(e.step for e in at_or_before)
            expected[k] = [e for e in at_or_before if e.step == last][-1].value  # later in the list wins
    np.testing.assert_allclose(sim.outputs - sim.states @ C.T, expected, rtol=0, atol=1e-14)


def test_with_an_unreachable_setpoint_a_measured_disturbance_moves_the_best_fit():
    # One valve for two outputs: no steady state meets both setpoints, and the target is the
    # Q-weighted best fit (Muske and Badgwell 2002's target calculation, least squares).  A held
    # measured disturbance moves the steady outputs by G_m d_m, so the best fit is
    # u* = argmin |W (G u + G_m d_m - r)| (numpy lstsq, the reference), G = C (I - A)^-1 B,
    # G_m = C (I - A)^-1 Bd.  The loop must settle there and say so in its targets; on the
    # fixed-law path (one linear recursion) and on the step loop alike.
    from service.solver.evaluation.simulation import UnconstrainedPolicy

    b = B[:, :1]
    weights = np.array([1.0, 3.0])
    d = design_controller(A, b, C, output_weight=weights, move_weight=[0.1], prediction=30, control=3)
    gain = C @ np.linalg.solve(np.eye(2) - A, b)
    g_m = C @ np.linalg.solve(np.eye(2) - A, BD)
    r, d_m = np.array([1.0, 0.4]), np.array([2.5])
    scenario = Scenario(steps=400, setpoint_changes=[Event(0, r)], measured_disturbances=[Event(150, d_m)])
    w = np.diag(np.sqrt(weights))
    u_star = np.linalg.lstsq(w @ gain, w @ (r - g_m @ d_m), rcond=None)[0]
    z_star = gain @ u_star + g_m @ d_m
    for kind in ("full_state", "output_disturbance"):
        est = design_estimator(A, b, C, kind=kind)
        fixed = simulate_loop(d, est, scenario, b_disturbance=BD)
        stepped = simulate_loop(d, est, scenario, b_disturbance=BD, policy=UnconstrainedPolicy(d.gain.horizon))
        for sim in (fixed, stepped):
            assert sim.diverged_at is None
            np.testing.assert_allclose(sim.outputs[-1], z_star, atol=1e-8)
            np.testing.assert_allclose(sim.targets[-1], z_star, atol=1e-10)
            np.testing.assert_allclose(sim.inputs[-1], u_star, atol=1e-8)
        np.testing.assert_allclose(fixed.inputs, stepped.inputs, rtol=1e-9, atol=1e-11)
