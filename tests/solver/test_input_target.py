"""Input targets (``weights.input``): the spare inputs of a plant with more inputs than outputs.

References named beside each check: the steady-state target against a least-squares solution
on the null space with ``scipy.linalg.lstsq`` and ``scipy.linalg.null_space``, and against
``scipy.optimize.minimize`` (SLSQP) with equality constraints; the gains against a dense
re-derivation of the QP here (prediction matrices by matrix powers, the stacked cost's normal
equations solved with ``numpy.linalg.solve``); the closed loop's eigenvalues with
``numpy.linalg.eigvals``.  The plant is invented (two outputs, three inputs).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize

from service.solver.design.controller import design_controller
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop, whole_loop
from service.solver.estimation.target import steady_state_target, target_problem
from service.solver.evaluation.simulation import Event, Scenario, TruePlant, simulate_loop

# Invented: three first-order lags, two outputs, three coupled inputs.
A = np.diag([0.8, 0.7, 0.9])
B = np.array([[1.0, 0.5, 0.2], [0.3, 1.0, 0.4], [0.2, 0.1, 1.0]])
C = np.array([[1.0, 0.2, 0.0], [0.0, 1.0, 0.5]])
Q = np.array([1.0, 2.0])
R = np.array([0.1, 0.2, 0.1])
S_FULL = np.array([[0.05, 0.01, 0.0], [0.01, 0.04, 0.0], [0.0, 0.0, 0.02]])


def _reference_target(a, b, c, s, r, ut):
    """min |S^(1/2) (u - u_t)| over the steady states with C x = r (scipy lstsq on the null space)."""
    n, m = b.shape
    eq = np.block([[np.eye(n) - a, -b], [c, np.zeros((c.shape[0], m))]])
    rhs = np.concatenate([np.zeros(n), r])
    particular = scipy.linalg.lstsq(eq, rhs)[0]
    null = scipy.linalg.null_space(eq)
    v = scipy.linalg.sqrtm(s).real
    z = scipy.linalg.lstsq(v @ null[n:], v @ (ut - particular[n:]))[0]
    return particular + null @ z


def test_target_matches_least_squares_on_the_null_space():
    # Reference: scipy.linalg.lstsq on the null space of the steady-state and output equations.
    r, ut = np.array([1.0, -0.5]), np.array([0.5, -0.2, 1.0])
    t = steady_state_target(target_problem(A, B, C, output_weight=Q, input_weight=S_FULL), r, input_target=ut)
    ref = _reference_target(A, B, C, S_FULL, r, ut)
    np.testing.assert_allclose(np.concatenate([t.state, t.input]), ref, rtol=0, atol=1e-10)
    np.testing.assert_allclose(C @ t.state, r, rtol=0, atol=1e-12)  # outputs first: exactly on r
    assert t.reachable


def test_target_matches_equality_constrained_minimize():
    # Reference: scipy.optimize.minimize (SLSQP) with the steady-state and output equations as
    # equality constraints, on a diagonal input weight and an output disturbance d.
    s = np.array([0.3, 1.0, 2.0])
    r, ut, d = np.array([0.4, 0.7]), np.array([-1.0, 0.5, 0.25]), np.array([0.1, -0.2])
    problem = target_problem(
        A, B, C, disturbance_input=np.zeros((3, 2)), disturbance_output=np.eye(2), output_weight=Q, input_weight=s
    )
    t = steady_state_target(problem, r, d, input_target=ut)
    n = 3
    cons = [
        {"type": "eq", "fun": lambda xi: (np.eye(n) - A) @ xi[:n] - B @ xi[n:]},
        {"type": "eq", "fun": lambda xi: C @ xi[:n] + d - r},
    ]
    res = scipy.optimize.minimize(
        lambda xi: float(np.sum(s * (xi[n:] - ut) ** 2)),
        np.zeros(6),
        constraints=cons,
        method="SLSQP",
        options={"ftol": 1e-14, "maxiter": 500},
    )
    assert res.success
    np.testing.assert_allclose(np.concatenate([t.state, t.input]), res.x, rtol=0, atol=1e-6)


def test_no_input_weight_keeps_the_least_norm_target():
    # Without S the maps are those of before (least norm |[x_s; u_s]|, scipy.linalg.pinv).
    r = np.array([1.0, -0.5])
    plain = target_problem(A, B, C, output_weight=Q)
    zero = target_problem(A, B, C, output_weight=Q, input_weight=np.zeros(3))
    np.testing.assert_array_equal(plain.setpoint_map, zero.setpoint_map)
    assert not np.any(zero.input_target_map)
    eq = np.block([[np.eye(3) - A, -B], [C, np.zeros((2, 3))]])
    ref = scipy.linalg.pinv(eq) @ np.concatenate([np.zeros(3), r])
    np.testing.assert_allclose(plain.setpoint_map @ r, ref, rtol=0, atol=1e-12)


def _dense_law(a, b, c, q, r_w, s, hp, hu, x, u, r, ut, free=None):
    """The first move of the QP of the design notes plus |u - u_s|^2_S, derived densely here."""
    n, m = b.shape
    p = c.shape[0]
    powers = [np.linalg.matrix_power(a, i) for i in range(hp + 1)]
    fx = np.vstack([c @ powers[i] for i in range(1, hp + 1)])
    step = [c @ sum((powers[j] for j in range(i)), np.zeros((n, n))) @ b for i in range(hp + 1)]
    fu = np.vstack([step[i] for i in range(1, hp + 1)])
    g = np.zeros((hp * p, hu * m))
    for i in range(1, hp + 1):
        for j in range(min(i, hu)):
            g[(i - 1) * p : i * p, j * m : (j + 1) * m] = step[i - j]
    lower = np.kron(np.tril(np.ones((hu, hu))), np.eye(m))
    if free is not None:
        cols = np.concatenate([np.arange(j * m, (j + 1) * m) for j in free])
        g, lower = g[:, cols], lower[:, cols]
    qbar = np.kron(np.eye(hp), np.diag(q))
    rbar = np.kron(np.eye(g.shape[1] // m), np.diag(r_w))
    sbar = np.kron(np.eye(hu), s)
    h = g.T @ qbar @ g + rbar + lower.T @ sbar @ lower
    us = _reference_target(a, b, c, s, r, ut)[n:]
    e = np.tile(r, hp) - fx @ x - fu @ u
    linear = g.T @ qbar @ e + lower.T @ sbar @ np.tile(us - u, hu)
    return np.linalg.solve(h, linear)[:m], h


@pytest.mark.parametrize("free", [None, (0, 2, 3)])
def test_gains_match_a_dense_derivation_of_the_qp(free):
    # Reference: the stacked QP built here from matrix powers and solved with numpy.linalg.solve.
    hp, hu = 12, 5
    d = design_controller(
        A, B, C, output_weight=Q, move_weight=R, prediction=hp, control=hu, input_weight=S_FULL, blocking=free
    )
    rng = np.random.default_rng(3)
    for _ in range(3):
        x, u, r, ut = rng.normal(size=3), rng.normal(size=3), rng.normal(size=2), rng.normal(size=3)
        want, h = _dense_law(A, B, C, Q, R, S_FULL, hp, hu, x, u, r, ut, free)
        g = d.gain
        assert g.input_target is not None
        got = g.setpoint @ r + g.input_target @ ut - g.state @ x - g.previous_input @ u
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * max(1.0, np.abs(want).max()))
    np.testing.assert_allclose(d.hessian.matrix, h, rtol=1e-12, atol=1e-12)
    eig = np.linalg.eigvalsh(h)
    assert d.hessian.condition_number == pytest.approx(eig[-1] / eig[0], rel=1e-9)


def test_input_weight_makes_the_loop_strictly_stable():
    # Reference: numpy.linalg.eigvals of the closed-loop matrix [[A - B Kx, B (I - Ku)], [-Kx, I - Ku]].
    plain = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=20, control=4)
    assert [mode.cause for mode in plain.loop.marginal] == ["free_input_direction"]
    assert not plain.loop.stable
    assert any(w.code == "free_input_direction" and "weights.input" in w.message for w in plain.warnings)
    pulled = design_controller(
        A, B, C, output_weight=Q, move_weight=R, prediction=20, control=4, input_weight=[0.02, 0.02, 0.02]
    )
    g = pulled.gain
    m = np.block([[A - B @ g.state, B @ (np.eye(3) - g.previous_input)], [-g.state, np.eye(3) - g.previous_input]])
    radius = float(np.abs(np.linalg.eigvals(m)).max())
    assert radius == pytest.approx(pulled.loop.spectral_radius, abs=1e-12)
    assert radius < 1.0 - 1e3 * MARGINAL_TOLERANCE
    assert pulled.loop.stable and not pulled.loop.marginal
    assert not any(w.code == "free_input_direction" for w in pulled.warnings)


def test_square_plant_input_target_has_no_say():
    # With no spare direction (square, nonsingular) the target's inputs follow r alone: U_t = 0.
    a, b, c = A[:2, :2], B[:2, :2], np.eye(2)
    problem = target_problem(a, b, c, input_weight=[1.0, 1.0])
    assert not np.any(problem.input_target_map)
    d = design_controller(
        a, b, c, output_weight=[1, 1], move_weight=[0.1, 0.1], prediction=10, control=3, input_weight=[1.0, 1.0]
    )
    assert d.gain.input_target is not None and not np.any(d.gain.input_target)


def test_gain_error_run_is_offset_free_and_inputs_settle_on_their_targets():
    # 20 % more gain in the true plant.  References: the setpoint itself (offset-free conditions,
    # Muske and Badgwell 2002; Pannocchia and Rawlings 2003) and the true plant's own target by
    # scipy.linalg.lstsq on its null space (a uniform gain error leaves the spare direction as it is).
    s = np.array([0.02, 0.02, 0.02])
    d = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=20, control=5, input_weight=s)
    est = design_estimator(A, B, C)
    whole = whole_loop(control_loop(d, est))
    assert whole.stable and whole.separation_holds
    r, ut = np.array([1.0, -0.5]), np.array([0.5, -0.2, 1.0])
    scenario = Scenario(steps=500, setpoint_changes=[Event(5, r)], input_targets=ut)
    sim = simulate_loop(d, est, scenario, plant=TruePlant(A, 1.2 * B, C))
    assert np.abs(sim.outputs[-1] - r).max() < 1e-6
    true_target = _reference_target(A, 1.2 * B, C, np.diag(s), r, ut)
    np.testing.assert_allclose(sim.inputs[-1], true_target[3:], rtol=0, atol=1e-6)
    # Without input weights the same run leaves the spare direction where it drifted.
    plain = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=20, control=5)
    other = simulate_loop(plain, est, scenario, plant=TruePlant(A, 1.2 * B, C))
    assert np.abs(other.inputs[-1] - true_target[3:]).max() > 1e-3


def test_qp_with_inactive_limits_is_the_unconstrained_law_and_target_keeps_limits():
    # The move QP's linear term with the input pull: with loose limits a limited run equals the
    # fixed-law run (the same cost, common practice); with a tight limit on the spare input the
    # target's outputs stay on r while the input target is pulled as near as the limit allows
    # (reference: scipy.optimize.minimize, SLSQP, with the limit as a bound).
    from service.solver.limits.bounds import make_limits
    from service.solver.limits.limited_run import GainWhenFreePolicy, ReachableTargetRule
    from service.solver.limits.policy import ConstrainedPolicy
    from service.solver.limits.reachable_target import ReachableTargetProblem

    s = np.array([0.05, 0.05, 0.05])
    d = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=15, control=4, input_weight=s)
    est = design_estimator(A, B, C)
    loop = control_loop(d, est)
    r, ut = np.array([1.0, -0.5]), np.array([0.5, -0.2, 1.0])
    scenario = Scenario(steps=200, setpoint_changes=[Event(5, r)], input_targets=ut)
    free = simulate_loop(d, est, scenario, loop=loop)
    loose = make_limits(3, 2, input_min=-50.0, input_max=50.0)
    policy = ConstrainedPolicy.from_design(d, loose)
    run = simulate_loop(
        d, est, scenario, loop=loop, policy=policy, target_rule=ReachableTargetRule.from_loop(loop, loose)
    )
    np.testing.assert_allclose(run.inputs, free.inputs, rtol=0, atol=1e-9)
    tight = make_limits(3, 2, input_min=[-50.0, -50.0, -50.0], input_max=[50.0, 50.0, 0.05])
    target = ReachableTargetProblem(loop.target, input_min=tight.input_min, input_max=tight.input_max)
    t = target.solve(r, np.zeros(est.disturbance_size), ut)
    assert t.reachable and t.status == "optimal"
    n = 3
    res = scipy.optimize.minimize(
        lambda xi: float(np.sum(s * (xi[n:] - ut) ** 2)),
        np.zeros(6),
        constraints=[
            {"type": "eq", "fun": lambda xi: (np.eye(n) - A) @ xi[:n] - B @ xi[n:]},
            {"type": "eq", "fun": lambda xi: C @ xi[:n] - r},
        ],
        bounds=[(None, None)] * 5 + [(None, 0.05)],
        method="SLSQP",
        options={"ftol": 1e-14, "maxiter": 500},
    )
    assert res.success
    np.testing.assert_allclose(t.input, res.x[n:], rtol=0, atol=1e-6)
    limited = simulate_loop(
        d,
        est,
        scenario,
        loop=loop,
        policy=GainWhenFreePolicy(ConstrainedPolicy.from_design(d, tight), d.gain.horizon, d.input_target_gain),
        target_rule=ReachableTargetRule.from_loop(loop, tight),
    )
    assert np.abs(limited.outputs[-1] - r).max() < 1e-6
    np.testing.assert_allclose(limited.inputs[-1], res.x[n:], rtol=0, atol=1e-6)


@pytest.mark.parametrize("kind", ["per_output", "output_disturbance"])
def test_fixed_law_with_input_weight_gives_the_run_s_inputs(kind):
    # Reference: scipy.signal.dlsim of the fixed law driven by the run's measurements, setpoints
    # and input targets must give the run's inputs (20 % gain error, noise).
    import scipy.signal

    from service.solver.estimation.fixed_law import fixed_law

    d = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=15, control=4, input_weight=S_FULL)
    est = design_estimator(A, B, C, kind=kind)
    scenario = Scenario(
        steps=120,
        setpoint_changes=[Event(5, np.array([1.0, -0.5]))],
        output_disturbances=[Event(60, np.array([0.2, 0.1]))],
        noise_std=np.array([0.01, 0.02]),
        seed=4,
        input_targets=np.array([0.5, -0.2, 1.0]),
        input_target_changes=[Event(80, np.array([0.0, 0.3, -0.4]))],
    )
    run = simulate_loop(d, est, scenario, plant=TruePlant(A, 1.2 * B, C))
    law = fixed_law(d, est)
    assert law.targets == 3
    targets = np.tile([0.5, -0.2, 1.0], (120, 1))
    targets[80:] = [0.0, 0.3, -0.4]
    sys = law.system
    w = np.hstack([run.measured, run.setpoints, targets])
    _, v, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), w)
    np.testing.assert_allclose(v[:, :3], run.inputs, rtol=0, atol=1e-10 * np.abs(run.inputs).max())


def test_what_if_condition_numbers_with_input_weights_are_those_of_new_designs():
    # Reference: the Jacobi-scaled condition number of the Hessian of a design made anew with the
    # shorter control horizon or the scaled move weights (numpy.linalg.eigvalsh of D^-1/2 H D^-1/2).
    from service.solver.evaluation.advice import _condition_number

    d = design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=12, control=5, input_weight=S_FULL)
    for scale, control in ((1.0, 3), (10.0, 5), (10.0, 2)):
        new = design_controller(
            A, B, C, output_weight=Q, move_weight=scale * R, prediction=12, control=control, input_weight=S_FULL
        )
        h = new.hessian.matrix
        root = np.sqrt(np.diag(h))
        eig = np.linalg.eigvalsh(h / root[:, None] / root[None, :])
        got = _condition_number(A, B, C, d, move_scale=scale, control=control)
        assert got == pytest.approx(eig[-1] / eig[0], rel=1e-8)
