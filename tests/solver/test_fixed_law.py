"""The fixed law with its estimator as an LTI system, against the simulated loop.

References: ``scipy.signal.dlsim`` simulates the exported state-space system (scipy's own
discrete LTI simulation); the loop it must reproduce is ``simulate_loop``, whose one step is
the design notes' law with the current estimator.  A change of coordinates ``s_e = T s``
leaves an LTI system's input-output behaviour unchanged (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.fixed_law import fixed_law, law_in_units
from service.solver.evaluation.simulation import Event, Scenario, TruePlant, simulate_loop

# The bundled example vessel (invented numbers), with a measured feed disturbance.
A = np.array([[0.92, 0.05, 0, 0], [0, 0.85, 0, 0], [0, 0, 0.95, 0.03], [0.02, 0, 0, 0.8]])
B = np.array([[0.1, -0.02], [0.2, 0], [0, 0.08], [0.05, 0.15]])
C = np.array([[1.0, 0, 0, 0], [0, 0, 1.0, 0]])
BD = np.array([[0.05], [0.0], [0.02], [0.0]])


def _design():
    return design_controller(
        A, B, C, output_weight=np.array([1.0, 2.0]), move_weight=np.array([0.1, 0.1]), prediction=30, control=5
    )


def _scenario():
    return Scenario(
        steps=150,
        setpoint_changes=[Event(10, np.array([1.0, -0.5]))],
        input_disturbances=[Event(40, np.array([0.1, 0.0]))],
        output_disturbances=[Event(70, np.array([0.2, 0.1]))],
        measured_disturbances=[Event(20, np.array([1.0]))],
        noise_std=np.array([0.01, 0.02]),
        seed=3,
    )


@pytest.mark.parametrize(
    "kind,disturbance",
    [("output_disturbance", None), ("input_disturbance", None), ("kalman", "output"), ("kalman", "none")],
)
def test_the_law_driven_by_the_run_s_measurements_gives_the_run_s_inputs(kind, disturbance):
    design = _design()
    estimator = design_estimator(A, B, C, kind=kind, disturbance=disturbance)
    true = TruePlant(A * 1.02, B * 1.2, C, BD * 0.8)  # 20 % gain error, a slower plant
    run = simulate_loop(design, estimator, _scenario(), plant=true, b_disturbance=BD)
    law = fixed_law(design, estimator, b_disturbance=BD)
    sys = law.system
    w = np.hstack([run.measured, run.setpoints, run.measured_disturbances])
    _, v, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), w)  # scipy's LTI simulation
    scale = np.abs(run.inputs).max()
    np.testing.assert_allclose(v[:, :2], run.inputs, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(v[:, 2:], run.moves, rtol=0, atol=1e-10 * scale)


@pytest.mark.parametrize("kind", ["output_disturbance", "full_state"])
def test_with_one_valve_for_two_outputs_the_law_follows_the_measured_disturbance_s_best_fit(kind):
    # No steady state meets both setpoints: the loop tracks the target's best fit, which a
    # held measured disturbance moves (Z_m d_m).  The exported law must carry that in Kd, or
    # it would run another loop than /simulate's (scipy's dlsim as the reference simulation).
    b = B[:, :1]
    design = design_controller(A, b, C, output_weight=np.array([1.0, 2.0]), move_weight=[0.1], prediction=30, control=5)
    estimator = design_estimator(A, b, C, kind=kind)
    scenario = Scenario(
        steps=150,
        setpoint_changes=[Event(10, np.array([1.0, -0.5]))],
        measured_disturbances=[Event(20, np.array([1.0])), Event(90, np.array([-2.0]))],
    )
    run = simulate_loop(design, estimator, scenario, b_disturbance=BD)
    law = fixed_law(design, estimator, b_disturbance=BD)
    sys = law.system
    ins = run.states if kind == "full_state" else run.measured
    w = np.hstack([ins, run.setpoints, run.measured_disturbances])
    _, v, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), w)
    scale = np.abs(run.inputs).max()
    np.testing.assert_allclose(v[:, :1], run.inputs, rtol=0, atol=1e-10 * scale)


def test_the_split_form_with_the_input_applied_unchanged_is_the_system():
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    law = fixed_law(_design(), estimator)
    rng = np.random.default_rng(7)
    s, w = rng.normal(size=law.state_update.shape[0]), rng.normal(size=law.signal_update.shape[1])
    u = law.input_state @ s + law.input_direct @ w
    nxt = law.state_update @ s + law.signal_update @ w + law.applied_update @ u
    sys = law.system
    np.testing.assert_allclose(sys.a @ s + sys.b @ w, nxt, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose((sys.c @ s + sys.d @ w)[:2], u, rtol=1e-12, atol=1e-12)
    # the previous-input states take the applied input; the prediction is C x(k|k-1) + d(k|k-1)
    np.testing.assert_array_equal(law.applied_update[-2:], np.eye(2))
    np.testing.assert_allclose(law.prediction[:, :4], C)


def test_at_a_steady_state_on_the_setpoints_the_law_holds_its_input():
    # At a steady state of the model with the outputs on their setpoints and no disturbance,
    # the law holds the input still: the move output is zero (offset-free law; Muske and
    # Badgwell 2002).
    design = _design()
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    law = fixed_law(design, estimator)
    u_s = np.array([1.0, -2.0])
    x_s = np.linalg.solve(np.eye(4) - A, B @ u_s)
    y_s = C @ x_s
    s = np.concatenate([x_s, np.zeros(2), u_s])
    w = np.concatenate([y_s, y_s])
    v = law.system.c @ s + law.system.d @ w
    np.testing.assert_allclose(v[2:], 0.0, atol=1e-12)
    np.testing.assert_allclose(v[:2], u_s, atol=1e-12)


def test_units_change_the_coordinates_not_the_behaviour():
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    law = fixed_law(_design(), estimator, b_disturbance=BD)
    t = np.array([1.0, 1, 1, 1, 40.0, 0.5, 100.0, 3.0])
    win = np.array([40.0, 0.5, 40.0, 0.5, 7.0])
    su = np.array([100.0, 3.0])
    scaled = law_in_units(law, state_span=t, signal_span=win, input_span=su, measured_span=win[:2])
    rng = np.random.default_rng(11)
    w = rng.normal(size=(60, 5))
    _, v, _ = scipy.signal.dlsim((law.system.a, law.system.b, law.system.c, law.system.d, 1.0), w)
    sys = scaled.system
    _, ve, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), w * win)
    np.testing.assert_allclose(ve, v * np.concatenate([su, su]), rtol=1e-10, atol=1e-10)
