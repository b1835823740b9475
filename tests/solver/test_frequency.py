"""Frequency analysis of the loop: sensitivities, margins, bandwidth, controller realization."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.signal

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.realization import (
    StateSpace,
    closed_loop_poles,
    controller_system,
    estimate_feedback_gain,
    plant_system,
)
from service.solver.evaluation.frequency import design_frequency_analysis, frequency_analysis, frequency_grid
from tests.conftest import random_plant


def static_gain(k: float) -> StateSpace:
    """The proportional controller u = -k y as a state-space system without states."""
    return StateSpace(a=np.zeros((0, 0)), b=np.zeros((0, 1)), c=np.zeros((1, 0)), d=np.array([[-k]]))


def first_order_case(a: float, b: float, k: float, ts: float = 1.0):
    return frequency_analysis(plant_system([[a]], [[b]], [[1.0]]), static_gain(k), sample_time=ts)


def designed_loops(rng):
    """A 2x2 plant with a design and each estimator kind."""
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    design = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.3, 0.3], prediction=12, control=3)
    for kind in ("full_state", "output_disturbance", "input_disturbance", "kalman"):
        yield kind, a, b, c, design, design_estimator(a, b, c, kind=kind)


def test_sensitivity_plus_complementary_is_identity_at_every_frequency(rng):
    # Definition: S = (I + L)^-1 and T = L (I + L)^-1, so S + T = (I + L)(I + L)^-1 = I.
    for kind, *_, design, est in designed_loops(rng):
        fa = design_frequency_analysis(design, est, sample_time=0.5, points=120)
        for loop in (fa.plant_input, fa.plant_output):
            eye = np.eye(loop.sensitivity.shape[-1])
            np.testing.assert_allclose(
                loop.sensitivity + loop.complementary,
                np.broadcast_to(eye, loop.sensitivity.shape),
                atol=1e-9,
                err_msg=kind,
            )


def test_sensitivities_equal_closed_loop_transfers_from_a_disturbance_at_the_break_point(rng):
    # Block-diagram algebra (the definition of S): with an output disturbance y = P u + d_o the
    # loop gives y = S_o d_o; with an input disturbance u_p = u + d_i it gives u_p = S_i d_i.
    # Both transfers are formed here from one closed-loop realization, independently of L.
    for kind, a, b, _c, design, est in designed_loops(rng):
        n = a.shape[0]
        plant = plant_system(a, b, est.c_measured[:, :n])
        ctrl = controller_system(design, est)
        fa = design_frequency_analysis(design, est, sample_time=1.0, points=60)
        z = np.exp(1j * fa.frequencies)
        cy = plant.c
        a_cl = np.block([[a + b @ ctrl.d @ cy, b @ ctrl.c], [ctrl.b @ cy, ctrl.a]])
        py, m = cy.shape[0], b.shape[1]
        out = StateSpace(
            a=a_cl, b=np.vstack([b @ ctrl.d, ctrl.b]), c=np.hstack([cy, np.zeros((py, ctrl.a.shape[0]))]), d=np.eye(py)
        )
        inp = StateSpace(
            a=a_cl, b=np.vstack([b, np.zeros((ctrl.a.shape[0], m))]), c=np.hstack([ctrl.d @ cy, ctrl.c]), d=np.eye(m)
        )
        np.testing.assert_allclose(fa.plant_output.sensitivity, out.evaluate(z), atol=1e-9, err_msg=kind)
        np.testing.assert_allclose(fa.plant_input.sensitivity, inp.evaluate(z), atol=1e-9, err_msg=kind)


def test_margins_of_a_proportional_loop_on_a_first_order_plant():
    # Hand computation.  P(z) = b/(z - a), u = -k y, so L(z) = k b / (z - a) with a = 0.5,
    # b = 1, k = 1, Ts = 1.
    # Gain crossover: |e^(jw) - a|^2 = 1 - 2 a cos w + a^2 = (k b)^2 gives
    #   cos w_c = (1 + a^2 - (k b)^2) / (2 a) = 0.25,  w_c = arccos(0.25) = 1.3181 rad/s;
    #   arg L = -arg(e^(j w_c) - a), so PM = 180 - atan2(sin w_c, cos w_c - a) degrees = 75.52.
    # Phase crossover: L is real and negative only at z = -1 (w = pi): L(-1) = -k b/(1 + a),
    #   so GM = (1 + a)/(k b) = 1.5 (and indeed k = 1.5 puts the closed-loop pole a - k b at -1).
    fa = first_order_case(0.5, 1.0, 1.0)
    m = fa.plant_input.margins
    wc = np.arccos(0.25)
    assert m.gain_crossover_frequency == pytest.approx(wc, rel=1e-10)
    assert m.phase_margin == pytest.approx(180.0 - np.degrees(np.arctan2(np.sin(wc), np.cos(wc) - 0.5)), rel=1e-9)
    assert m.gain_margin == pytest.approx(1.5, rel=1e-12)
    assert m.gain_margin_db == pytest.approx(20 * np.log10(1.5), rel=1e-12)
    assert m.phase_crossover_frequency == pytest.approx(np.pi, rel=1e-15)
    assert fa.plant_output.margins == m  # a single loop has the same L at either break point


def test_margins_of_a_proportional_loop_on_an_integrator_scale_with_the_sample_time():
    # Hand computation.  P(z) = 1/(z - 1), u = -y: L = 1/(z - 1).  |e^(jw) - 1| = 2 sin(w/2) = 1
    # at w = pi/3 per sample, where arg(e^(j pi/3) - 1) = 120 deg, so PM = 60 deg; L(-1) = -1/2
    # gives GM = 2 (6.02 dB).  With Ts = 0.5 the frequencies are per sample divided by Ts.
    fa = first_order_case(1.0, 1.0, 1.0, ts=0.5)
    m = fa.plant_input.margins
    assert m.phase_margin == pytest.approx(60.0, rel=1e-10)
    assert m.gain_crossover_frequency == pytest.approx((np.pi / 3) / 0.5, rel=1e-10)
    assert m.gain_margin == pytest.approx(2.0, rel=1e-12)
    assert m.phase_crossover_frequency == pytest.approx(np.pi / 0.5, rel=1e-15)


def test_peaks_and_bandwidth_of_the_first_order_loop_in_closed_form():
    # Hand computation for a = 0.5, b = k = 1: S(z) = (z - a)/(z - c), T = k b/(z - c) with the
    # closed-loop pole c = a - k b = -0.5.  Both peak at z = -1: |S| = 1.5/0.5 = 3, |T| = 2.
    # |S|^2 = 1/2 solves to cos w = (c^2 - 1 - 2 a^2)/(2 c - 4 a) = 5/12; |S(1)| = 1/3 < 1/sqrt 2,
    # so that is where |S| first crosses 1/sqrt(2) from below: the bandwidth.
    fa = first_order_case(0.5, 1.0, 1.0)
    loop = fa.plant_input
    assert loop.peak_sensitivity == pytest.approx(3.0, rel=1e-10)
    assert loop.peak_sensitivity_frequency == pytest.approx(np.pi, rel=1e-6)
    assert loop.peak_complementary == pytest.approx(2.0, rel=1e-10)
    assert loop.bandwidth == pytest.approx(np.arccos(5.0 / 12.0), rel=1e-10)
    assert fa.stable and fa.closed_loop_poles[0] == pytest.approx(-0.5)


def test_full_state_loop_at_the_plant_input_against_scipy_signal(rng):
    # Reference library: the open loop L = -K P at the plant input as one series system
    # (scipy.signal.ss2tf of plant then controller), evaluated by scipy.signal.dfreqresp.
    a, b, c = random_plant(rng, 3, 1, 1, radius=0.9)
    design = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.2], prediction=10, control=2)
    est = design_estimator(a, b, c, kind="full_state")
    fa = design_frequency_analysis(design, est, sample_time=1.0, points=50)
    kx, ku = design.gain.state, design.gain.previous_input
    # Series u -> x (plant) -> u' (controller on s = u'(k-1)): s(k+1) = (1 - Ku) s - Kx x and
    # u' = (1 - Ku) s - Kx x; the loop transfer is -u'.
    series_a = np.block([[a, np.zeros((3, 1))], [-kx, 1 - ku]])
    series_b = np.vstack([b, np.zeros((1, 1))])
    series_c = -np.hstack([-kx, 1 - ku])
    num, den = scipy.signal.ss2tf(series_a, series_b, series_c, np.zeros((1, 1)))
    num = num[0][np.argmax(np.abs(num[0]) > 1e-12 * np.abs(num[0]).max()) :]  # strictly proper: drop the leading zero
    _, reference = scipy.signal.dfreqresp(scipy.signal.dlti(num, den, dt=1.0), w=fa.frequencies)
    np.testing.assert_allclose(fa.plant_input.loop[:, 0, 0], reference, rtol=1e-8, atol=1e-10)


def test_separation_principle_for_every_estimator(rng):
    # Separation principle (common practice): the loop's poles are the state-feedback poles
    # together with the estimator poles eig((I - L Cy) A_aug).
    for kind, a, b, _c, design, est in designed_loops(rng):
        n = a.shape[0]
        poles = closed_loop_poles(plant_system(a, b, est.c_measured[:, :n]), controller_system(design, est))
        union = np.concatenate([design.loop.poles, est.poles])
        assert poles.size == union.size, kind
        distance = np.abs(poles[:, None] - union[None, :])
        rows, cols = scipy.optimize.linear_sum_assignment(distance)
        assert distance[rows, cols].max() < 1e-7, kind


def test_feedback_on_the_estimate_keeps_the_design_state_gain(rng):
    # The plant columns of K are Kx (module notes), also with the terminal weight.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    for terminal in ("none", "riccati"):
        design = design_controller(
            a, b, c, output_weight=[1.0, 2.0], move_weight=[0.3, 0.1], prediction=6, control=6, terminal=terminal
        )
        for kind in ("output_disturbance", "input_disturbance"):
            est = design_estimator(a, b, c, kind=kind)
            k = estimate_feedback_gain(design, est)
            np.testing.assert_allclose(k[:, :3], design.gain.state, atol=1e-10)


def test_terminal_design_with_input_disturbance_is_offset_free_in_closed_loop(rng):
    # Offset-free property (Pannocchia and Rawlings 2003): with nd = p and a stable loop, a
    # constant input disturbance on the true plant leaves no steady-state output error.  At
    # the closed loop's DC operating point the plant output is zero for any disturbance:
    # the transfer from an input disturbance to y vanishes at z = 1.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    design = design_controller(
        a, b, c, output_weight=[1.0, 1.0], move_weight=[0.3, 0.3], prediction=5, control=5, terminal="riccati"
    )
    est = design_estimator(a, b, c, kind="input_disturbance")
    ctrl = controller_system(design, est)
    a_cl = np.block([[a + b @ ctrl.d @ c, b @ ctrl.c], [ctrl.b @ c, ctrl.a]])
    to_y = StateSpace(
        a=a_cl,
        b=np.vstack([b, np.zeros((ctrl.a.shape[0], 2))]),
        c=np.hstack([c, np.zeros((2, ctrl.a.shape[0]))]),
        d=np.zeros((2, 2)),
    )
    assert np.abs(closed_loop_poles(plant_system(a, b, c), ctrl)).max() < 1
    np.testing.assert_allclose(to_y.evaluate(np.array([1.0 + 0j]))[0], 0.0, atol=1e-9)


def test_peak_is_the_supremum_over_a_dense_grid(rng):
    # Definition of the peak (the H-infinity norm of S on the unit circle): no frequency of a
    # 20 000-point brute-force grid may exceed it, and the densest grid comes close to it.
    _, a, b, c, design, est = list(designed_loops(rng))[2]
    fa = design_frequency_analysis(design, est, sample_time=1.0, points=80)
    dense = design_frequency_analysis(design, est, sample_time=1.0, points=20000)
    for coarse, fine in [(fa.plant_input, dense.plant_input), (fa.plant_output, dense.plant_output)]:
        brute = fine.sensitivity_singular_values[:, 0].max()
        assert coarse.peak_sensitivity >= brute - 1e-9
        assert coarse.peak_sensitivity == pytest.approx(brute, rel=1e-6)


def test_frequency_grid_is_log_spaced_up_to_nyquist():
    # Definition of the grid (module notes).
    grid = frequency_grid(0.25, points=9, decades=2.0)
    assert grid.size == 9 and grid[-1] == np.pi / 0.25
    np.testing.assert_allclose(np.diff(np.log10(grid)), 0.25, rtol=1e-12)
    assert grid[0] == pytest.approx(np.pi / 0.25 / 100.0, rel=1e-14)


def test_multivariable_loop_has_no_classical_margins(rng):
    # Classical margins are defined for a single loop only.
    for _, _a, _b, _c, design, est in designed_loops(rng):
        fa = design_frequency_analysis(design, est, sample_time=1.0, points=20)
        assert fa.plant_input.margins is None and fa.plant_output.margins is None
        assert fa.stable == bool(np.abs(fa.closed_loop_poles).max() < 1 - 1e-6)
        assert scipy.linalg.norm(fa.plant_input.sensitivity[0]) > 0
