"""Closed-loop simulation: the law by hand, offset-free control, decay rates, separation.

Sources: the control law ``du(k) = Kr r - Kx x(k) - Ku u(k-1)`` of the design notes applied
in a loop written here; the offset-free conditions of Muske and Badgwell 2002 and
Pannocchia and Rawlings 2003 (with ``nd = p`` disturbances and a stable loop the outputs
settle on the setpoint under mismatch); the steady-state offset of a loop without a
disturbance model (common practice); the separation principle (common practice) and the
decay of a linear recursion at the rate of its dominant eigenvalue (common practice);
``numpy.random.default_rng`` for the seeded noise.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.design.controller import design_controller
from service.solver.design.gain import optimal_moves
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop, whole_loop
from service.solver.evaluation.simulation import (
    Event,
    PolicyStep,
    Scenario,
    TruePlant,
    UnconstrainedPolicy,
    simulate_loop,
)
from tests.conftest import random_plant

# An invented two-by-two process (not from any publication): two coupled first-order lags.
A = np.array([[0.9, 0.05], [0.0, 0.8]])
B = np.array([[0.1, 0.02], [0.03, 0.2]])
C = np.eye(2)
# The "real" plant: slower, stronger and more coupled than the model.
A_TRUE = np.array([[0.92, 0.06], [0.01, 0.82]])
B_TRUE = np.array([[0.12, 0.03], [0.025, 0.24]])


def _design(a=A, b=B, c=C, **kw):
    options = {"output_weight": [1.0, 1.0], "move_weight": [0.1, 0.1], "prediction": 20, "control": 3}
    options.update(kw)
    return design_controller(a, b, c, **options)


def _scenario(steps=600, **kw):
    """Setpoint changes at 5 and 250, an output disturbance at 120, input ones at 60 and 350."""

    def within(*events):
        return [e for e in events if e.step < steps]

    return Scenario(
        steps=steps,
        setpoint_changes=within(Event(5, np.array([1.0, -0.5])), Event(250, np.array([0.4, 0.3]))),
        output_disturbances=within(Event(120, np.array([0.3, 0.2]))),
        input_disturbances=within(Event(60, np.array([0.1, 0.0])), Event(350, np.array([-0.05, 0.08]))),
        **kw,
    )


def test_full_state_without_mismatch_applies_the_design_gains(rng):
    d = _design()
    scenario = _scenario(
        steps=300,
        noise_std=np.array([0.05, 0.05]),
        seed=3,
        initial_state=np.array([0.2, -0.1]),
        initial_input=np.array([0.05, 0.0]),
    )
    sim = simulate_loop(d, design_estimator(A, B, C, kind="full_state"), scenario)
    # The loop by hand with du = Kr r - Kx x - Ku u(k-1), input disturbances in the plant.
    kr, kx, ku = d.gain.setpoint, d.gain.state, d.gain.previous_input
    x, u = scenario.initial_state.copy(), scenario.initial_input.copy()
    d_in = np.zeros(2)
    inputs = []
    for k in range(scenario.steps):
        r = sim.setpoints[k]
        u = u + kr @ r - kx @ x - ku @ u
        inputs.append(u)
        for ev in scenario.input_disturbances:
            if ev.step == k:
                d_in = ev.value
        x = A @ x + B @ (u + d_in)
    np.testing.assert_allclose(sim.inputs, np.array(inputs), rtol=1e-10, atol=1e-12)
    # the setpoint before the first change is the initial output (the loop starts at rest)
    np.testing.assert_allclose(sim.setpoints[0], C @ scenario.initial_state)


def test_events_hold_from_their_step_and_replace_the_previous_level():
    d = _design()
    sim = simulate_loop(d, design_estimator(A, B, C), _scenario(steps=400))
    np.testing.assert_array_equal(sim.setpoints[4], [0.0, 0.0])
    np.testing.assert_array_equal(sim.setpoints[5], [1.0, -0.5])
    np.testing.assert_array_equal(sim.setpoints[249], [1.0, -0.5])
    np.testing.assert_array_equal(sim.setpoints[250:], np.tile([0.4, 0.3], (150, 1)))
    # output disturbance shows in the output immediately: y = C x + d_out
    np.testing.assert_allclose(sim.outputs[120] - sim.states[120] @ C.T, [0.3, 0.2], atol=1e-15)
    np.testing.assert_allclose(sim.outputs[119] - sim.states[119] @ C.T, [0.0, 0.0], atol=1e-15)
    np.testing.assert_allclose(sim.time, np.arange(400.0))
    np.testing.assert_allclose(np.cumsum(sim.moves, axis=0), sim.inputs - sim.initial_input, atol=1e-12)


@pytest.mark.parametrize(
    "kind, options",
    [
        ("output_disturbance", {}),
        ("input_disturbance", {}),
        (
            "kalman",
            {
                "disturbance": "output",
                "process_noise": [0.1, 0.1],
                "disturbance_noise": [0.5, 0.5],
                "measurement_noise": [0.2, 0.2],
            },
        ),
        (
            "kalman",
            {
                "disturbance": "input",
                "process_noise": [0.1, 0.1],
                "disturbance_noise": [0.5, 0.5],
                "measurement_noise": [0.2, 0.2],
            },
        ),
    ],
)
def test_disturbance_models_remove_the_offset_under_mismatch(kind, options):
    d = _design()
    est = design_estimator(A, B, C, kind=kind, **options)
    sim = simulate_loop(d, est, _scenario(steps=900), plant=TruePlant(A_TRUE, B_TRUE, C))
    assert sim.diverged_at is None
    offset = np.abs(sim.outputs[-1] - sim.setpoints[-1])
    assert offset.max() < 1e-6, offset
    # and the target handed to the controller is the setpoint itself (square, reachable)
    np.testing.assert_allclose(sim.targets[-1], sim.setpoints[-1], atol=1e-12)


@pytest.mark.parametrize("kind, options", [("full_state", {}), ("kalman", {"disturbance": "none"})])
def test_without_a_disturbance_model_mismatch_leaves_an_offset(kind, options):
    # The classic steady-state offset of a model-based loop without disturbance estimation
    # (common practice): the estimate is consistent with the model, not with the plant.
    d = _design()
    sim = simulate_loop(
        d, design_estimator(A, B, C, kind=kind, **options), _scenario(steps=900), plant=TruePlant(A_TRUE, B_TRUE, C)
    )
    assert sim.diverged_at is None
    tail = sim.outputs[-50:] - sim.setpoints[-50:]
    assert np.ptp(tail, axis=0).max() < 1e-6  # settled ...
    assert np.abs(tail[-1]).max() > 1e-2  # ... but not on the setpoint


def _dominant_real(poles: np.ndarray) -> float:
    top = poles[np.argmax(np.abs(poles))]
    assert abs(top.imag) < 1e-12
    return float(top.real)


def test_the_response_decays_at_the_design_s_dominant_closed_loop_pole():
    # For e(k) = sum_i c_i lambda_i^k the ratio e(k+1)/e(k) tends to the dominant lambda,
    # the error being O((lambda_2/lambda_1)^k) (common practice).
    a, b, c = [[0.9]], [[0.1]], [[1.0]]
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1.0], prediction=10, control=1)
    lam = _dominant_real(d.loop.poles)
    second = float(np.sort(np.abs(d.loop.poles))[0])
    sim = simulate_loop(
        d,
        design_estimator(a, b, c, kind="full_state"),
        Scenario(steps=80, setpoint_changes=[Event(0, np.array([1.0]))]),
    )
    e = sim.setpoints[:, 0] - sim.outputs[:, 0]
    k = 40  # (second/lam)^40 is about 1e-12 here
    assert (second / lam) ** k < 1e-10
    np.testing.assert_allclose(e[k + 1] / e[k], lam, rtol=1e-9)


def test_an_output_disturbance_decays_at_the_whole_loop_s_dominant_pole():
    # A disturbance step excites the estimator's modes as well; the slowest one overall is a
    # pole of the whole loop (controller and estimator), here the estimator's.
    a, b, c = [[0.9]], [[0.1]], [[1.0]]
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1.0], prediction=10, control=1)
    est = design_estimator(
        a, b, c, kind="kalman", process_noise=[1.0], disturbance_noise=[0.01], measurement_noise=[1.0]
    )
    loop = whole_loop(control_loop(d, est))
    lam = _dominant_real(loop.poles)
    assert np.isclose(lam, _dominant_real(est.poles))  # the slow mode is the estimator's
    second = float(np.sort(np.abs(loop.poles))[-2])
    sim = simulate_loop(d, est, Scenario(steps=400, output_disturbances=[Event(0, np.array([1.0]))]))
    e = sim.setpoints[:, 0] - sim.outputs[:, 0]
    k = 300
    assert (second / lam) ** k < 1e-12
    np.testing.assert_allclose(e[k + 1] / e[k], lam, rtol=1e-9)


@pytest.mark.parametrize("kind", ["full_state", "output_disturbance", "input_disturbance", "kalman"])
def test_whole_loop_poles_are_the_union_of_controller_and_estimator_poles(rng, kind):
    for _ in range(3):
        a, b, c = random_plant(rng, 4, 2, 2, radius=0.95)
        d = design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.5, 0.2], prediction=15, control=2)
        est = design_estimator(a, b, c, kind=kind)
        loop = whole_loop(control_loop(d, est))
        assert loop.poles.size == 4 + est.augmented_size * (not est.full_state) + 2
        assert loop.separation_holds, loop.separation_error
        assert loop.separation_error < 1e-8
        np.testing.assert_array_equal(loop.controller_poles, d.loop.poles)
        np.testing.assert_array_equal(loop.estimator_poles, est.poles)


def test_whole_loop_matrix_reproduces_the_simulated_run(rng):
    # The matrix on [x; x(k|k-1); u(k-1)] and the step-by-step loop are two codings of the
    # same recursion: from the same start they must give the same inputs.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    d = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.3, 0.3], prediction=12, control=2)
    est = design_estimator(a, b, c, kind="input_disturbance")
    loop = whole_loop(control_loop(d, est))
    x0, u0 = rng.normal(size=3), rng.normal(size=2)
    sim = simulate_loop(d, est, Scenario(steps=30, initial_state=x0, initial_input=u0, initial_setpoint=np.zeros(2)))
    z = np.concatenate([x0, x0, np.zeros(2), u0])
    for k in range(30):
        z = loop.matrix @ z
        np.testing.assert_allclose(z[-2:], sim.inputs[k], atol=1e-10)
        if k + 1 < 30:
            np.testing.assert_allclose(z[:3], sim.states[k + 1], atol=1e-10)


def test_noise_is_seeded_and_has_the_requested_spread():
    d = _design()
    est = design_estimator(A, B, C)
    std = np.array([0.01, 0.03])
    one = simulate_loop(d, est, _scenario(steps=20000, noise_std=std, seed=7))
    again = simulate_loop(d, est, _scenario(steps=20000, noise_std=std, seed=7))
    other = simulate_loop(d, est, _scenario(steps=20000, noise_std=std, seed=8))
    np.testing.assert_array_equal(one.inputs, again.inputs)
    assert not np.array_equal(one.inputs, other.inputs)
    noise = one.measured - one.outputs
    np.testing.assert_allclose(noise, np.random.default_rng(7).standard_normal((20000, 2)) * std, atol=1e-15)
    np.testing.assert_allclose(noise.std(axis=0), std, rtol=0.03)


class _RecordingPolicy:
    """A policy written against the Protocol: the full optimal sequence, first move applied."""

    def __init__(self, design):
        self.design = design
        self.calls = []

    def __call__(self, *, error, free_prediction, previous_input, step):
        d = self.design
        moves = optimal_moves(d.hessian, d.weighted, d.output_root, error)
        self.calls.append((error.shape, free_prediction.shape, previous_input.copy(), step))
        m = previous_input.size
        return PolicyStep(moves[:m], {"step": step, "horizon_moves": moves.size})


def test_a_policy_plugs_in_and_its_reports_are_kept():
    d = _design()
    est = design_estimator(A, B, C)
    policy = _RecordingPolicy(d)
    sim = simulate_loop(d, est, _scenario(steps=200), plant=TruePlant(A_TRUE, B_TRUE, C), policy=policy)
    plain = simulate_loop(
        d, est, _scenario(steps=200), plant=TruePlant(A_TRUE, B_TRUE, C), policy=UnconstrainedPolicy(d.gain.horizon)
    )
    # dU* = H^-1 G'Q E solved afresh equals Kh E: same run
    np.testing.assert_allclose(sim.inputs, plain.inputs, atol=1e-10)
    assert [c[3] for c in policy.calls] == list(range(200))
    np_p = d.prediction.penalized_steps * 2
    assert policy.calls[0][:2] == ((np_p,), (np_p,))
    np.testing.assert_array_equal(policy.calls[10][2], sim.inputs[9])
    assert sim.reports[17] == {"step": 17, "horizon_moves": 6}
    assert plain.reports[17] is None


def test_a_blown_up_run_stops_cleanly_and_says_where():
    # Reversing the plant's gain makes the loop unstable; no floating-point warning may
    # escape (pytest turns warnings into errors here).
    d = _design()
    sim = simulate_loop(
        d,
        design_estimator(A, B, C, kind="full_state"),
        Scenario(steps=100000, setpoint_changes=[Event(0, np.array([1.0, 1.0]))]),
        plant=TruePlant(A, -3.0 * B, C),
    )
    assert sim.diverged_at is not None and 0 < sim.diverged_at < 100000
    assert np.all(np.isnan(sim.inputs[sim.diverged_at :]))
    assert np.all(np.isfinite(sim.inputs[: sim.diverged_at]))
    assert len(sim.reports) == 100000


def test_with_fewer_inputs_than_outputs_the_loop_settles_on_the_nearest_reachable_steady_state(rng):
    # One input, two outputs, an output disturbance: r cannot be reached, and the loop must
    # settle where the steady-state gain G0 = C (I - A)^-1 B can get closest in the Q-norm,
    # z = G0 u* + d with u* = argmin |W (G0 u + d - r)| (weighted least squares, reference
    # numpy.linalg.lstsq), plant equal to the model.
    a, b, c = random_plant(rng, 3, 1, 2, radius=0.9)
    q = np.array([1.0, 3.0])
    d = design_controller(a, b, c, output_weight=q, move_weight=[0.3], prediction=12, control=2)
    r, dist = np.array([1.0, 0.5]), np.array([0.5, -0.2])
    sim = simulate_loop(
        d,
        design_estimator(a, b, c),
        Scenario(steps=800, setpoint_changes=[Event(3, r)], output_disturbances=[Event(100, dist)]),
    )
    g0 = c @ np.linalg.solve(np.eye(3) - a, b)
    w = np.sqrt(q)[:, None]
    u_star = np.linalg.lstsq(w * g0, (w * (r - dist)[:, None]).ravel(), rcond=None)[0]
    np.testing.assert_allclose(sim.outputs[-1], g0 @ u_star + dist, atol=1e-8)
    np.testing.assert_allclose(sim.targets[-1], sim.outputs[-1], atol=1e-8)
    assert np.abs(sim.outputs[-1] - r).max() > 0.1


class _StepByStep:
    """``du = Kh E`` like UnconstrainedPolicy, but another type: the loop runs step by step."""

    def __init__(self, horizon_gain):
        self.horizon_gain = horizon_gain

    def __call__(self, *, error, free_prediction, previous_input, step):
        return PolicyStep(self.horizon_gain @ error)


@pytest.mark.parametrize("kind", ["full_state", "output_disturbance", "input_disturbance"])
@pytest.mark.parametrize("measured", [False, True])
def test_the_fixed_law_recursion_equals_the_step_by_step_loop(rng, kind, measured):
    # Reference: the module's step-by-step loop (the equations of one step, in order) with the
    # same law Kh E; the fixed law's single linear recursion must give the same run to rounding,
    # with noise, every kind of event, a true plant with 20 % gain error and measured disturbances.
    n, m, p = 4, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.9)
    bd = rng.normal(size=(n, 1)) if measured else None
    design = design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.2, 0.1], prediction=20, control=3)
    estimator = design_estimator(a, b, c, kind=kind)
    scenario = Scenario(
        steps=80,
        setpoint_changes=[Event(2, np.array([1.0, -0.5]))],
        output_disturbances=[Event(30, np.array([0.2, 0.1]))],
        input_disturbances=[Event(45, np.array([-0.1, 0.05]))],
        measured_disturbances=[Event(60, np.array([0.5]))] if measured else [],
        noise_std=None if kind == "full_state" else np.array([0.01, 0.02]),
        seed=3,
        initial_input=np.array([0.1, -0.2]),
    )
    true = TruePlant(a, 1.2 * b, c, bd)
    fast = simulate_loop(design, estimator, scenario, plant=true, b_disturbance=bd)
    slow = simulate_loop(
        design, estimator, scenario, plant=true, b_disturbance=bd, policy=_StepByStep(design.gain.horizon)
    )
    for name in ("outputs", "measured", "inputs", "moves", "targets", "target_inputs", "estimates", "states"):
        np.testing.assert_allclose(getattr(fast, name), getattr(slow, name), rtol=1e-11, atol=1e-12, err_msg=name)
    assert fast.diverged_at is None and slow.diverged_at is None


def test_the_fixed_law_recursion_stops_where_the_step_loop_does(rng):
    # A plant whose true gain has the wrong sign makes the loop grow without bound: both routes
    # stop at the same step (the divergence limit on |x|^2, |x(k+1|k)|^2 and |u|^2) and leave
    # the rows after it empty (NaN).
    a, b, c = np.array([[1.1]]), np.array([[1.0]]), np.array([[1.0]])
    design = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.1], prediction=10, control=2)
    estimator = design_estimator(a, b, c, kind="output_disturbance")
    scenario = Scenario(steps=5000, setpoint_changes=[Event(1, np.array([1.0]))])
    true = TruePlant(a, -b, c, None)
    fast = simulate_loop(design, estimator, scenario, plant=true)
    slow = simulate_loop(design, estimator, scenario, plant=true, policy=_StepByStep(design.gain.horizon))
    assert slow.diverged_at is not None and fast.diverged_at == slow.diverged_at
    rows = slow.diverged_at
    assert np.isnan(fast.inputs[rows:]).all() and np.isfinite(fast.inputs[: rows - 1]).all()
    np.testing.assert_allclose(fast.inputs[: rows - 20], slow.inputs[: rows - 20], rtol=1e-9)
