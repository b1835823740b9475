"""The loop on the model with scaled gains and longer dead times (analysis.model_error).

References: the perturbed plant's transfer matrix against ``f z^-d C (zI - A)^-1 B`` evaluated
directly (the definition); the loop's poles against python-control, which builds the perturbed
plant from the model and ``d`` scalar delays ``1/z^d`` (``control.tf``, ``control.append``,
``control.series``) and closes it with the controller realization by ``control.feedback``
(positive feedback: the realization already carries the sign); for a ``full_state`` controller,
against the closed loop on ``[x; u(k-1)]`` written out by hand from ``du = -Kx x - Ku u(k-1)``
(the textbook incremental form, dense numpy).
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop
from service.solver.estimation.realization import controller_system
from service.solver.evaluation.model_error import (
    ModelErrorCase,
    model_error_study,
    perturbed_plant,
    stable_factor_range,
)

#: An invented 2 x 2 plant: a composition from two first-order lags and an integrating level.
A = np.array([[0.9, 0.0, 0.0], [0.0, 0.8, 0.0], [0.0, 0.0, 1.0]])
B = np.array([[0.1, 0.05], [0.0, 0.2], [0.02, -0.05]])
C = np.array([[1.0, 1.0, 0.0], [0.0, 0.0, 1.0]])


def _design(a, b, c):
    m, p = b.shape[1], c.shape[0]
    return design_controller(
        a,
        b,
        c,
        output_weight=np.ones(p),
        move_weight=np.full(m, 0.5),
        prediction=30,
        control=3,
    )


def _estimator(a, b, c):
    return design_estimator(a, b, c, kind="per_output")


def _transfer(a, b, c, z):
    return c @ np.linalg.solve(z * np.eye(a.shape[0]) - a, b)


@pytest.mark.parametrize("shape", [(3, 2), (2, 3)])
@pytest.mark.parametrize("d", [0, 1, 4])
def test_the_perturbed_plant_is_f_z_to_the_minus_d_times_the_model(shape, d, rng):
    n = 4
    m, p = shape
    a, b, c = 0.3 * rng.normal(size=(n, n)), rng.normal(size=(n, m)), rng.normal(size=(p, n))
    a_t, b_t, c_t = perturbed_plant(a, b, c, gain_factor=1.7, extra_dead_time=d)
    assert a_t.shape[0] == n + d * min(m, p)
    for z in (1.3, -0.7 + 0.4j, 2.0j):
        assert np.allclose(_transfer(a_t, b_t, c_t, z), 1.7 * z ** (-d) * _transfer(a, b, c, z), rtol=1e-10, atol=1e-12)


def _python_control_poles(design, estimator, f, d, ts=1.0):
    k = controller_system(design, estimator)
    controller = control.ss(k.a, k.b, k.c, k.d, ts)
    m, p = B.shape[1], C.shape[0]
    plant = control.ss(A, f * B, C, np.zeros((p, m)), ts)
    if d:
        delay = control.append(*[control.tf([1.0], [1.0] + [0.0] * d, ts) for _ in range(m)])
        plant = control.series(control.ss(delay), plant)
    return np.asarray(control.poles(control.feedback(plant, controller, sign=1)))


def _python_control_radius(design, estimator, f, d, ts=1.0):
    return float(np.abs(_python_control_poles(design, estimator, f, d, ts)).max())


def test_spectral_radii_match_python_control_on_the_perturbed_plant():
    design, estimator = _design(A, B, C), _estimator(A, B, C)
    loop = control_loop(design, estimator)
    factors, delays = [0.5, 1.0, 1.5, 3.0, 6.0], [0, 2]
    study = model_error_study(loop, A, B, C, gain_factors=factors, extra_dead_times=delays)
    assert [(case.gain_factor, case.extra_dead_time) for case in study.cases] == [
        (f, d) for d in delays for f in factors
    ]
    for case in study.cases:
        theirs = _python_control_radius(design, estimator, case.gain_factor, case.extra_dead_time)
        assert case.spectral_radius == pytest.approx(theirs, rel=1e-7), case
        expected = "stable" if theirs < 1 - 1e-6 else "unstable" if theirs > 1 + 1e-6 else "marginal"
        assert case.verdict == expected
    # The nominal loop is stable, and some factor asked is not: the range ends before it.
    nominal = next(c for c in study.cases if c.gain_factor == 1.0 and c.extra_dead_time == 0)
    assert nominal.verdict == "stable"
    assert any(c.verdict == "unstable" for c in study.cases)  # two samples more dead time and 50 % more gain
    for d, low, high in study.stable_ranges:
        row = sorted((c for c in study.cases if c.extra_dead_time == d), key=lambda c: c.gain_factor)
        stable = [c.gain_factor for c in row if c.verdict == "stable"]
        assert low is not None and high is not None and low <= 1.0 <= high
        assert all(c.verdict == "stable" for c in row if low <= c.gain_factor <= high)
        beyond = [c for c in row if c.gain_factor > high]
        assert not beyond or beyond[0].verdict != "stable"
        assert set(stable) >= {f for f in factors if low <= f <= high}


def test_full_state_loop_matches_the_closed_loop_written_out():
    design = _design(A, B, C)
    estimator = design_estimator(A, B, C, kind="full_state")
    loop = control_loop(design, estimator)
    study = model_error_study(loop, A, B, C, gain_factors=[0.25, 1.0, 4.0], extra_dead_times=[0])
    kx, ku = design.gain.state, design.gain.previous_input
    m = B.shape[1]
    for case in study.cases:
        fb = case.gain_factor * B
        # du = -Kx x - Ku u(k-1):  u(k) = -Kx x + (I - Ku) u(k-1),  x(k+1) = A x + f B u(k)
        matrix = np.block([[A - fb @ kx, fb @ (np.eye(m) - ku)], [-kx, np.eye(m) - ku]])
        assert case.spectral_radius == pytest.approx(float(np.abs(np.linalg.eigvals(matrix)).max()), rel=1e-10)


def _cases(verdicts):
    return [ModelErrorCase(f, 0, 0.0, v, 0, 0.0, v) for f, v in verdicts]


def test_the_stable_range_is_the_run_around_the_factor_nearest_one():
    cases = _cases([(4.0, "unstable"), (0.25, "unstable"), (0.5, "stable"), (1.1, "stable"), (2.0, "marginal")])
    assert stable_factor_range(cases) == (0.5, 1.1)
    # A stable factor beyond an unstable one is not part of the range.
    cases = _cases([(0.5, "stable"), (1.0, "stable"), (2.0, "unstable"), (3.0, "stable")])
    assert stable_factor_range(cases) == (0.5, 1.0)
    assert stable_factor_range(_cases([(0.9, "unstable"), (2.0, "stable")])) == (None, None)


def test_a_pole_the_design_leaves_on_the_circle_is_set_aside_for_the_verdict_of_the_rest():
    # The level carries no output weight (as a zone output in the unconstrained gains): no gain
    # sees its integrator (nor the estimator's disturbance on it), so z = 1 stays a pole of the
    # loop for every gain factor and dead time, and the plain verdict is marginal throughout.
    # The rest of the loop decides.
    design = design_controller(
        A, B, C, output_weight=np.array([1.0, 0.0]), move_weight=np.full(2, 0.5), prediction=30, control=3
    )
    estimator = _estimator(A, B, C)
    loop = control_loop(design, estimator)
    factors, delays = [0.5, 1.0, 2.0, 4.0, 8.0, 16.0], [0, 3]
    study = model_error_study(loop, A, B, C, gain_factors=factors, extra_dead_times=delays)
    for case in study.cases:
        # python-control's poles of the same loop; those at z = 1 (a defective pair scatters by
        # about sqrt(eps)) are the level's
        theirs = _python_control_poles(design, estimator, case.gain_factor, case.extra_dead_time)
        at_one = np.abs(theirs - 1.0) <= 1e-6
        assert case.nominal_circle_poles == np.count_nonzero(at_one) >= 1, case
        rest = float(np.abs(theirs[~at_one]).max())
        assert case.rest_spectral_radius == pytest.approx(rest, rel=1e-7), case
        expected = "stable" if rest < 1 - 1e-6 else "unstable" if rest > 1 + 1e-6 else "marginal"
        assert case.rest_verdict == expected
        assert case.verdict == ("unstable" if expected == "unstable" else "marginal")
    verdicts = {c.rest_verdict for c in study.cases}
    assert verdicts == {"stable", "unstable"}, "the factors asked reach an unstable rest"
    for d, low, high in study.stable_ranges:
        row = sorted((c for c in study.cases if c.extra_dead_time == d), key=lambda c: c.gain_factor)
        assert low is not None and high is not None and low <= 1.0 <= high
        assert all(c.rest_verdict == "stable" for c in row if low <= c.gain_factor <= high)
        beyond = [c for c in row if c.gain_factor > high]
        assert not beyond or beyond[0].rest_verdict != "stable"


def test_a_loop_without_poles_on_the_circle_has_the_same_verdict_twice():
    design, estimator = _design(A, B, C), _estimator(A, B, C)
    study = model_error_study(
        control_loop(design, estimator), A, B, C, gain_factors=[0.5, 1.0, 3.0, 6.0], extra_dead_times=[0, 2]
    )
    for case in study.cases:
        assert case.nominal_circle_poles == 0
        assert (case.rest_verdict, case.rest_spectral_radius) == (case.verdict, case.spectral_radius)
