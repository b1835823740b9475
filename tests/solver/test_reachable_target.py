"""The steady-state target under input limits: nearest reachable steady state, no windup."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.target import steady_state_target, target_problem
from service.solver.evaluation.simulation import Event, Scenario, simulate_loop
from service.solver.limits.bounds import make_limits
from service.solver.limits.policy import ConstrainedPolicy
from service.solver.limits.reachable_target import ReachableTargetProblem, reachable_target
from tests.conftest import random_plant


def steady_gain(a, b, c):
    """``Cz (I - A)^-1 B``, the steady-state gain of a plant without a pole at z = 1."""
    return c @ np.linalg.solve(np.eye(a.shape[0]) - a, b)


@pytest.mark.parametrize("seed", range(4))
def test_square_plant_matches_bounded_least_squares(seed):
    # Reference: scipy.optimize.lsq_linear(method="bvls") on min |W (K u + d - r)| subject to
    # the input bounds, with K = C (I - A)^-1 B the steady-state gain (for a stable plant every
    # steady state is x = (I - A)^-1 B u) and an output disturbance d (Dz = I).
    rng = np.random.default_rng(seed)
    n, m = 4, 2
    a, b, c = random_plant(rng, n, m, m, radius=0.8)
    q = rng.uniform(0.5, 3.0, m)
    problem = target_problem(a, b, c, disturbance_input=np.zeros((n, m)), disturbance_output=np.eye(m), output_weight=q)
    low, high = -np.ones(m), np.ones(m)
    k = steady_gain(a, b, c)
    r = 3.0 * rng.normal(size=m) * np.abs(k).sum(axis=1)  # well beyond what |u| <= 1 reaches
    d = rng.normal(size=m) * 0.3
    target = reachable_target(problem, r, d, input_min=low, input_max=high)
    w = np.sqrt(q)
    reference = scipy.optimize.lsq_linear(w[:, None] * k, w * (r - d), bounds=(low, high), method="bvls", tol=1e-14)
    assert target.solved and target.status == "optimal" and not target.reachable
    np.testing.assert_allclose(target.input, reference.x, atol=1e-8)
    np.testing.assert_allclose(target.output, k @ reference.x + d, atol=1e-8)
    np.testing.assert_allclose(target.state, np.linalg.solve(np.eye(n) - a, b @ target.input), atol=1e-8)
    assert np.all(target.input >= low) and np.all(target.input <= high)
    assert np.any(target.input_at_min | target.input_at_max)


def test_limits_out_of_the_way_give_the_unconstrained_target(rng):
    # Where the limits do not bind, the answer is service.solver.estimation.target's own (least-norm) target.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.7)
    problem = target_problem(a, b, c)
    r = np.array([0.1, -0.2])
    free = steady_state_target(problem, r)
    target = reachable_target(problem, r, input_min=[-1e3, -1e3], input_max=[1e3, 1e3])
    assert target.status == "unconstrained" and target.reachable
    np.testing.assert_array_equal(target.input, free.input)
    np.testing.assert_array_equal(target.output, free.output)
    assert not target.input_at_min.any() and not target.input_at_max.any()


def test_more_inputs_than_outputs_takes_the_least_norm_best_fit(rng):
    # Three inputs, two outputs: the best fit leaves a line of steady states; the target must
    # be the best fit (scipy.optimize.lsq_linear, method "bvls", fixes the fitted outputs, which
    # are unique) and, among those, the least norm |[x_s; u_s]| (scipy.optimize.minimize,
    # method "SLSQP", with the fitted outputs as equality constraints).
    n, m, p = 3, 3, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.7)
    problem = target_problem(a, b, c, output_weight=[1.0, 4.0])
    k = steady_gain(a, b, c)
    low, high = -np.ones(m), np.ones(m)
    r = 4.0 * np.abs(k).sum(axis=1) * np.array([1.0, -1.0])
    target = reachable_target(problem, r, input_min=low, input_max=high)
    assert target.status == "optimal" and not target.reachable
    w = np.sqrt([1.0, 4.0])
    fit = scipy.optimize.lsq_linear(w[:, None] * k, w * r, bounds=(low, high), method="bvls", tol=1e-14)
    np.testing.assert_allclose(target.output, k @ fit.x, atol=1e-8)
    state_of = np.linalg.solve(np.eye(n) - a, b)  # x_s = state_of u_s

    def norm2(u):
        return float(np.sum((state_of @ u) ** 2) + np.sum(u**2))

    least = scipy.optimize.minimize(
        norm2,
        fit.x,
        method="SLSQP",
        bounds=list(zip(low, high, strict=False)),
        constraints=[{"type": "eq", "fun": lambda u: k @ u - k @ fit.x}],
        options={"ftol": 1e-14, "maxiter": 500},
    )
    assert least.success
    np.testing.assert_allclose(target.input, least.x, atol=1e-6)
    assert norm2(target.input) <= norm2(least.x) + 1e-9


def test_integrating_plant_target_by_hand():
    # Worked by hand.  A tank level x1 integrates the inflow u1 less the outflow u2
    # (x1+ = x1 + 0.1 (u1 - u2)) and a first-order temperature x2+ = 0.5 x2 + u2 has gain 2.
    # Steady state needs u1 = u2 and x2 = 2 u2; the level may sit anywhere.  With u <= 1 the
    # setpoint (5, 3) is corrected to (5, 2): both inputs at 1, the level kept at 5.
    a = np.array([[1.0, 0.0], [0.0, 0.5]])
    b = np.array([[0.1, -0.1], [0.0, 1.0]])
    c = np.eye(2)
    target = reachable_target(target_problem(a, b, c), [5.0, 3.0], input_min=[0.0, 0.0], input_max=[1.0, 1.0])
    np.testing.assert_allclose(target.output, [5.0, 2.0], atol=1e-9)
    np.testing.assert_allclose(target.input, [1.0, 1.0], atol=1e-9)
    np.testing.assert_allclose(target.state, [5.0, 2.0], atol=1e-9)
    assert target.input_at_max.all() and not target.reachable


def test_one_setup_serves_many_setpoints(rng):
    # The workspace is reused: solving again gives the answer of a fresh set-up.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.8)
    problem = target_problem(a, b, c)
    solver = ReachableTargetProblem(problem, input_min=[-1.0, -0.5], input_max=[1.0, 0.5])
    for _ in range(5):
        r = rng.normal(size=2) * 5.0
        again = solver.solve(r)
        fresh = reachable_target(problem, r, input_min=[-1.0, -0.5], input_max=[1.0, 0.5])
        np.testing.assert_allclose(again.input, fresh.input, atol=1e-10)


def test_saturating_step_settles_on_the_reachable_target_without_windup(rng):
    # A setpoint step beyond the input limits.  Handed the reachable target as its setpoint,
    # the constrained controller settles on it (outputs and inputs, the design notes' steady
    # state) and, once there, no limit is active in its QP: it is not pushing against a limit
    # (no windup).  Handed the raw setpoint it keeps an input limit active to the end.
    n, m, p = 4, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.8)
    design = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.2, 0.2], prediction=30, control=5)
    estimator = design_estimator(a, b, c, kind="full_state")
    limits = make_limits(m, p, input_min=-1.0, input_max=1.0, move_max=0.5)
    raw = 3.0 * np.abs(steady_gain(a, b, c)).sum(axis=1)
    target = reachable_target(target_problem(a, b, c), raw, input_min=limits.input_min, input_max=limits.input_max)
    assert not target.reachable and (target.input_at_max | target.input_at_min).any()

    def run(setpoint):
        scenario = Scenario(steps=150, setpoint_changes=[Event(0, setpoint)])
        return simulate_loop(design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, limits))

    corrected = run(target.output)
    np.testing.assert_allclose(corrected.outputs[-1], target.output, atol=1e-6)
    np.testing.assert_allclose(corrected.inputs[-1], target.input, atol=1e-6)
    assert all(not r.active_limits for r in corrected.reports[-10:])
    assert np.all(corrected.inputs <= 1.0 + 1e-9) and np.all(corrected.inputs >= -1.0 - 1e-9)

    chased = run(raw)
    assert all(any(x.kind == "input" for x in r.active_limits) for r in chased.reports[-10:])


@pytest.mark.parametrize("unit", [1.0, 1e6, 1e12])
def test_the_verdict_under_a_measured_disturbance_does_not_depend_on_its_unit(rng, unit):
    # The same measured disturbance in a unit ``unit`` times smaller (Bd_m / unit, d_m * unit) is
    # the same plant: the target and the verdict must not change (a change of units changes no
    # verdict, common practice).  The setpoint is out of reach inside the limits by about 1e-3
    # (reference: scipy.optimize.lsq_linear, bounded least squares), far above any rounding.
    from service.solver.estimation.target import with_measured_disturbances

    n, m = 3, 2
    a, b, c = random_plant(rng, n, m, m, radius=0.7)
    bd = rng.normal(size=(n, 1))
    k, k_m = steady_gain(a, b, c), steady_gain(a, bd, c)
    low, high = -np.ones(m), np.ones(m)
    d_m = np.array([0.7])
    u_edge = np.array([1.0 + 1e-3, 0.2])  # just beyond the upper limit of the first input
    r = k @ u_edge + k_m @ d_m
    reference = scipy.optimize.lsq_linear(k, r - k_m @ d_m, bounds=(low, high), method="bvls", tol=1e-14)
    assert np.abs(reference.fun).max() > 1e-5
    problem = with_measured_disturbances(target_problem(a, b, c), bd / unit)
    target = reachable_target(problem, r, d_m * unit, input_min=low, input_max=high)
    assert not target.reachable
    np.testing.assert_allclose(target.input, reference.x, rtol=0, atol=1e-8)
    np.testing.assert_allclose(target.output, k @ reference.x + k_m @ d_m, rtol=0, atol=1e-8)
    # a setpoint inside the limits stays reachable in every unit
    inside = reachable_target(problem, k @ np.array([0.5, -0.2]) + k_m @ d_m, d_m * unit, input_min=low, input_max=high)
    assert inside.reachable
