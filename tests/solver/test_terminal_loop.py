"""The Riccati terminal weight in the running loop: simulation, fixed law, QP, whole loop.

References: the infinite-horizon LQR gain of the incremental system from
``scipy.linalg.solve_discrete_are`` (``tests.references.incremental_lqr``) and the standard
result of dynamic programming that the Riccati cost to go on the last state makes the
horizon problem the infinite-horizon one (``Hu = Hp``); hand-written loops with prediction
matrices formed by ``numpy.linalg.matrix_power`` (the textbook sums, not the recursion the
solver uses) and steady-state targets by ``numpy.linalg.solve`` of the target equations
(Muske and Badgwell 2002); ``scipy.signal.dlsim`` for the fixed law as an LTI system.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.signal
from numpy.linalg import matrix_power

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.fixed_law import fixed_law
from service.solver.estimation.loop import control_loop, true_loop, whole_loop
from service.solver.evaluation.simulation import Event, Scenario, TruePlant, UnconstrainedPolicy, simulate_loop
from service.solver.limits.bounds import Limits
from service.solver.limits.limited_run import GainWhenFreePolicy, ReachableTargetRule
from service.solver.limits.policy import ConstrainedPolicy
from service.solver.limits.qp import MoveQP
from tests.references import incremental_lqr

# The bundled example vessel's numbers (invented), square: two inputs, two outputs.
A = np.array([[0.92, 0.05, 0, 0], [0, 0.85, 0, 0], [0, 0, 0.95, 0.03], [0.02, 0, 0, 0.8]])
B = np.array([[0.1, -0.02], [0.2, 0], [0, 0.08], [0.05, 0.15]])
C = np.array([[1.0, 0, 0, 0], [0, 0, 1.0, 0]])
Q, R = np.array([1.0, 2.0]), np.array([0.1, 0.1])
SETPOINT = np.array([1.0, -0.5])


def _design(hp, hu):
    return design_controller(A, B, C, output_weight=Q, move_weight=R, prediction=hp, control=hu, terminal="riccati")


def _steady_state(r, d=np.zeros(2)):
    """``[x_s; u_s]`` of ``(I - A) x = B u``, ``C x + d = r`` (square target equations, solved)."""
    target = np.block([[np.eye(4) - A, -B], [C, np.zeros((2, 2))]])
    return np.linalg.solve(target, np.concatenate([np.zeros(4), r - d]))


def test_terminal_run_with_hu_equal_to_hp_is_the_lqr_loop():
    # Dynamic programming: with the Riccati cost to go the first move is the LQR move
    # du = -K (xi - xi_s) on the deviation from the steady-state target, K from
    # scipy.linalg.solve_discrete_are (tests.references.incremental_lqr).
    design = _design(6, 6)
    estimator = design_estimator(A, B, C, kind="full_state")
    run = simulate_loop(design, estimator, Scenario(steps=120, setpoint_changes=[Event(5, SETPOINT)]))
    lqr, _, _ = incremental_lqr(A, B, C, np.diag(Q), np.diag(R))
    x, u, inputs = np.zeros(4), np.zeros(2), []
    for k in range(120):
        target = _steady_state(SETPOINT) if k >= 5 else np.zeros(6)
        u = u - lqr @ (np.concatenate([x, u]) - target)
        inputs.append(u)
        x = A @ x + B @ u
    np.testing.assert_allclose(run.inputs, np.array(inputs), rtol=0, atol=1e-12)
    # the setpoint step settles offset-free on the target input
    np.testing.assert_allclose(run.outputs[-1], SETPOINT, atol=1e-9)
    np.testing.assert_allclose(run.inputs[-1], _steady_state(SETPOINT)[4:], atol=1e-9)


def _hand_loop(design, estimator, scenario_steps, true, setpoint_at, d_out_at, x0=None):
    """The terminal law written out: du = Kh E + Kt (xi_s - Phi xi), output-disturbance estimator.

    Prediction by matrix powers: z(k+i) = C A^i x + d + C sum_{l<i} A^l B u(k-1) (the disturbance
    estimate held), xi(k+Hp) = [A^Hp x + sum_{l<Hp} A^l B u(k-1); u(k-1)]; the target from the
    square target equations with the estimated output disturbance.
    """
    hp = design.prediction.prediction
    at, bt, ct = true
    aug = np.block([[A, np.zeros((4, 2))], [np.zeros((2, 4)), np.eye(2)]])
    np.testing.assert_array_equal(estimator.a, aug)  # the layout written out here: [x; d]
    caug = np.hstack([C, np.eye(2)])
    gain = estimator.gain
    kh, kt = design.gain.horizon, design.terminal_gain
    x = np.zeros(at.shape[0]) if x0 is None else x0
    xp, u = np.concatenate([x, np.zeros(2)]), np.zeros(2)
    inputs, states = [], []
    for k in range(scenario_steps):
        r, d_out = setpoint_at(k), d_out_at(k)
        y = ct @ x + d_out
        xf = xp + gain @ (y - caug @ xp)
        xe, de = xf[:4], xf[4:]
        free = [
            C @ matrix_power(A, i) @ xe + de + C @ sum(matrix_power(A, j) for j in range(i)) @ B @ u
            for i in range(1, hp + 1)
        ]
        error = np.concatenate([r - f for f in free])
        xi_free = np.concatenate([matrix_power(A, hp) @ xe + sum(matrix_power(A, j) for j in range(hp)) @ B @ u, u])
        du = kh @ error + kt @ (_steady_state(r, de) - xi_free)
        u = u + du
        inputs.append(u)
        states.append(np.concatenate([x, xp, u - du]))
        x = at @ x + bt @ u
        xp = aug @ xf + np.vstack([B, np.zeros((2, 2))]) @ u
    return np.array(inputs), np.array(states)


@pytest.mark.parametrize("horizons", [(8, 3), (5, 5)])
def test_terminal_fixed_law_run_equals_a_hand_written_loop(horizons):
    # 10 % gain error and a faster pole in the true plant; setpoint step and output disturbance.
    design = _design(*horizons)
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    true = (A * 1.01, B * 1.1, C)
    scenario = Scenario(
        steps=90,
        setpoint_changes=[Event(5, SETPOINT)],
        output_disturbances=[Event(40, np.array([0.2, 0.1]))],
    )
    run = simulate_loop(design, estimator, scenario, plant=TruePlant(*true))
    hand, _ = _hand_loop(
        design,
        estimator,
        90,
        true,
        lambda k: SETPOINT if k >= 5 else np.zeros(2),
        lambda k: np.array([0.2, 0.1]) if k >= 40 else np.zeros(2),
    )
    np.testing.assert_allclose(run.inputs, hand, rtol=0, atol=1e-10)
    # the step-by-step loop (any policy object other than the fixed law) gives the same run
    policy = UnconstrainedPolicy(design.gain.horizon, None, design.terminal_gain)
    stepped = simulate_loop(design, estimator, scenario, plant=TruePlant(*true), policy=lambda **kw: policy(**kw))
    np.testing.assert_allclose(stepped.inputs, run.inputs, rtol=0, atol=1e-12)
    # the fixed law as an LTI system (scipy.signal.dlsim) driven by the run's measurements
    sys = fixed_law(design, estimator).system
    _, v, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), np.hstack([run.measured, run.setpoints]))
    np.testing.assert_allclose(v[:, :2], run.inputs, rtol=0, atol=1e-10)
    np.testing.assert_allclose(v[:, 2:], run.moves, rtol=0, atol=1e-10)


def test_terminal_whole_loop_keeps_the_separation_and_true_loop_is_the_hand_loop_matrix():
    # Separation principle (common practice): the whole loop's poles are the LQR loop's
    # (scipy reference, Hu = Hp) and the estimator's.  The true loop's matrix, applied to a
    # start, gives the hand-written loop's states (setpoint at zero).
    design = _design(6, 6)
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    loop = control_loop(design, estimator)
    whole = whole_loop(loop)
    assert whole.separation_holds and whole.stable
    lqr, ai, bi = incremental_lqr(A, B, C, np.diag(Q), np.diag(R))
    np.testing.assert_allclose(
        np.sort_complex(whole.controller_poles), np.sort_complex(np.linalg.eigvals(ai - bi @ lqr)), atol=1e-8
    )
    at, bt = A * 1.01, B * 1.1
    matrix = true_loop(loop, at, bt, C).matrix  # on [x(k); x(k|k-1); u(k-1)]
    x0 = np.array([0.3, -0.2, 0.1, 0.4])
    _, states = _hand_loop(design, estimator, 30, (at, bt, C), lambda k: np.zeros(2), lambda k: np.zeros(2), x0=x0)
    iterated = [states[0]]
    for _ in range(29):
        iterated.append(matrix @ iterated[-1])
    np.testing.assert_allclose(np.array(iterated), states, rtol=0, atol=1e-12)


def _wide(m=2, p=2, size=1e6):
    return Limits(
        input_min=np.full(m, -size),
        input_max=np.full(m, size),
        move_max=np.full(m, size),
        output_min=np.full(p, -size),
        output_max=np.full(p, size),
        output_softness=np.full(p, 1e3),
    )


def test_terminal_qp_linear_term_is_the_gradient_of_the_whole_cost():
    # The QP's cost is V(dU) = |G dU - E|^2_Q' + |dU|^2_R + |Gamma dU - e_t|^2_P (the last step's
    # output weight given way to P): its linear term is minus the gradient at dU = 0,
    # -(G' Q' E + Gamma' P e_t), formed here by hand from the design's G, Q, P and Gamma.
    design = _design(8, 3)
    qp = MoveQP.from_design(design, _wide())
    rng = np.random.default_rng(5)
    error, free, u = rng.normal(size=16), rng.normal(size=16), rng.normal(size=2)
    e_t = rng.normal(size=6)
    problem = qp.problem(error=error, free_prediction=free, previous_input=u, terminal_error=e_t)
    weights = np.kron(np.eye(8), np.diag(Q))
    weights[-2:, -2:] = 0.0
    g = design.prediction.moves
    expected = g.T @ weights @ error + design.terminal.moves.T @ design.terminal.matrix @ e_t
    np.testing.assert_allclose(-problem.linear[:6], expected, rtol=1e-12, atol=1e-12)
    # ... and its unconstrained solution's first move is the law's du = Kh E + Kt e_t
    solution = qp.solve(error=error, free_prediction=free, previous_input=u, terminal_error=e_t)
    np.testing.assert_allclose(solution.moves[:2], design.gain.horizon @ error + design.terminal_gain @ e_t, atol=1e-10)


def test_terminal_run_under_wide_limits_is_the_unconstrained_run():
    design = _design(8, 3)
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    loop = control_loop(design, estimator)
    scenario = Scenario(
        steps=80, setpoint_changes=[Event(5, SETPOINT)], output_disturbances=[Event(40, np.array([0.2, 0.1]))]
    )
    free = simulate_loop(design, estimator, scenario, loop=loop)
    wide = _wide()
    policy = GainWhenFreePolicy(
        ConstrainedPolicy.from_design(design, wide), loop.horizon_gain, None, design.terminal_gain
    )
    limited = simulate_loop(
        design, estimator, scenario, loop=loop, policy=policy, target_rule=ReachableTargetRule.from_loop(loop, wide)
    )
    np.testing.assert_allclose(limited.inputs, free.inputs, rtol=0, atol=1e-12)
    # the QP alone (no Kh E substitution) agrees to its solve's rounding
    alone = simulate_loop(
        design,
        estimator,
        scenario,
        loop=loop,
        policy=ConstrainedPolicy.from_design(design, wide),
        target_rule=ReachableTargetRule.from_loop(loop, wide),
    )
    np.testing.assert_allclose(alone.inputs, free.inputs, rtol=0, atol=1e-9)


def test_terminal_run_under_a_binding_input_limit_keeps_the_limit_and_settles_inside():
    # A setpoint whose steady input is beyond the limit: the reachable target moves, the input
    # stays inside its limit and the run settles (no windup).
    design = _design(8, 3)
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    loop = control_loop(design, estimator)
    limits = Limits(
        input_min=np.array([-0.4, -np.inf]),
        input_max=np.array([0.4, np.inf]),
        move_max=np.full(2, np.inf),
        output_min=np.full(2, -np.inf),
        output_max=np.full(2, np.inf),
        output_softness=np.full(2, 1e3),
    )
    policy = GainWhenFreePolicy(
        ConstrainedPolicy.from_design(design, limits), loop.horizon_gain, None, design.terminal_gain
    )
    run = simulate_loop(
        design,
        estimator,
        Scenario(steps=200, setpoint_changes=[Event(5, np.array([3.0, 0.0]))]),
        loop=loop,
        policy=policy,
        target_rule=ReachableTargetRule.from_loop(loop, limits),
    )
    assert abs(_steady_state(np.array([3.0, 0.0]))[4]) > 0.4  # the setpoint is out of reach
    assert np.all(np.abs(run.inputs[:, 0]) <= 0.4 + 1e-9)
    assert abs(abs(run.inputs[-1, 0]) - 0.4) < 1e-9  # held on its limit at the end
    np.testing.assert_allclose(run.moves[-1], 0.0, atol=1e-8)


BD = np.array([[0.05], [0.0], [0.02], [0.0]])  # a measured feed disturbance (invented)


def _steady_state_with(r, dm):
    """``[x_s; u_s]`` of ``(I - A) x = B u + Bd d_m``, ``C x = r`` (the target equations, solved)."""
    target = np.block([[np.eye(4) - A, -B], [C, np.zeros((2, 2))]])
    return np.linalg.solve(target, np.concatenate([BD @ dm, r]))


def test_terminal_run_with_a_measured_disturbance_is_the_lqr_loop_on_the_shifted_target():
    # With d_m held, xi_s(r, d_m) is a fixed point of the incremental system, and in deviations
    # from it the horizon problem with the Riccati cost to go is the LQR problem (dynamic
    # programming): du = -K (xi - xi_s(r, d_m)), K from scipy.linalg.solve_discrete_are.
    design = _design(6, 6)
    estimator = design_estimator(A, B, C, kind="full_state")
    scenario = Scenario(
        steps=120, setpoint_changes=[Event(5, SETPOINT)], measured_disturbances=[Event(40, np.array([2.0]))]
    )
    run = simulate_loop(design, estimator, scenario, b_disturbance=BD)
    lqr, _, _ = incremental_lqr(A, B, C, np.diag(Q), np.diag(R))
    x, u, inputs = np.zeros(4), np.zeros(2), []
    for k in range(120):
        r = SETPOINT if k >= 5 else np.zeros(2)
        dm = np.array([2.0]) if k >= 40 else np.zeros(1)
        u = u - lqr @ (np.concatenate([x, u]) - _steady_state_with(r, dm))
        inputs.append(u)
        x = A @ x + B @ u + BD @ dm
    np.testing.assert_allclose(run.inputs, np.array(inputs), rtol=0, atol=1e-12)
    np.testing.assert_allclose(run.outputs[-1], SETPOINT, atol=1e-9)  # the disturbance fed forward, no offset
    # the step-by-step loop gives the same run
    policy = UnconstrainedPolicy(design.gain.horizon, None, design.terminal_gain)
    stepped = simulate_loop(design, estimator, scenario, b_disturbance=BD, policy=lambda **kw: policy(**kw))
    np.testing.assert_allclose(stepped.inputs, run.inputs, rtol=0, atol=1e-12)
    # under limits out of the way the reachable-target rule, given d_m, holds X_m d_m in its
    # steady state: the terminal error then gains only - Phi_m d_m, and the run is the same
    loop = control_loop(design, estimator)
    wide = _wide()
    limited = simulate_loop(
        design,
        estimator,
        scenario,
        loop=loop,
        b_disturbance=BD,
        policy=GainWhenFreePolicy(
            ConstrainedPolicy.from_design(design, wide), loop.horizon_gain, None, design.terminal_gain
        ),
        target_rule=ReachableTargetRule.from_loop(loop, wide, b_disturbance=BD),
    )
    np.testing.assert_allclose(limited.inputs, run.inputs, rtol=0, atol=1e-10)


def test_terminal_fixed_law_with_a_measured_disturbance_is_the_run():
    # The fixed law as an LTI system (scipy.signal.dlsim) on the run's measurements, setpoints
    # and measured disturbances gives the run's inputs, on a true plant with gain error.
    design = _design(8, 3)
    estimator = design_estimator(A, B, C, kind="output_disturbance")
    scenario = Scenario(
        steps=120,
        setpoint_changes=[Event(5, SETPOINT)],
        measured_disturbances=[Event(30, np.array([2.0]))],
        output_disturbances=[Event(70, np.array([0.2, 0.1]))],
    )
    run = simulate_loop(design, estimator, scenario, plant=TruePlant(A, B * 1.1, C, BD * 0.8), b_disturbance=BD)
    sys = fixed_law(design, estimator, b_disturbance=BD).system
    w = np.hstack([run.measured, run.setpoints, run.measured_disturbances])
    _, v, _ = scipy.signal.dlsim((sys.a, sys.b, sys.c, sys.d, 1.0), w)
    np.testing.assert_allclose(v[:, :2], run.inputs, rtol=0, atol=1e-10)
    policy = UnconstrainedPolicy(design.gain.horizon, None, design.terminal_gain)
    stepped = simulate_loop(
        design,
        estimator,
        scenario,
        plant=TruePlant(A, B * 1.1, C, BD * 0.8),
        b_disturbance=BD,
        policy=lambda **kw: policy(**kw),
    )
    np.testing.assert_allclose(stepped.inputs, run.inputs, rtol=0, atol=1e-12)


def test_terminal_qp_with_move_blocking_solves_the_blocked_cost():
    # Moves only at steps 0, 2 and 5 of Hp = 8: the blocked design's G and Gamma hold one
    # column block per free move (design.prediction.moves, design.terminal.moves). The QP's
    # linear term is minus the gradient of the whole blocked cost at dU = 0, formed by hand,
    # and with an input limit that binds its solution is the minimizer of that cost under
    # the limit found by scipy.optimize.minimize (SLSQP, an independent general-purpose solver).
    from scipy.optimize import minimize

    design = design_controller(
        A, B, C, output_weight=Q, move_weight=R, prediction=8, control=6, terminal="riccati", blocking=(0, 2, 5)
    )
    g, gamma, p_t = design.prediction.moves, design.terminal.moves, design.terminal.matrix
    free_moves = g.shape[1]
    assert free_moves == 3 * 2
    rng = np.random.default_rng(11)
    error, free, u = rng.normal(size=16), rng.normal(size=16), np.array([0.1, -0.2])
    e_t = rng.normal(size=6)
    weights = np.kron(np.eye(8), np.diag(Q))
    weights[-2:, -2:] = 0.0  # the last step's output weight gives way to P

    def blocked_qp(limits):
        # as service.pipeline.limits builds it: the QP's moves are the free (blocked) moves
        return MoveQP(
            prediction=dataclasses.replace(design.prediction, control=3),
            hessian=design.hessian,
            weighted=design.weighted,
            output_root=design.output_root,
            limits=limits,
            terminal_rows=(design.terminal.weighted_moves, design.terminal.root),
        )

    problem = blocked_qp(_wide()).problem(error=error, free_prediction=free, previous_input=u, terminal_error=e_t)
    expected = g.T @ weights @ error + gamma.T @ p_t @ e_t
    np.testing.assert_allclose(-problem.linear[:free_moves], expected, rtol=1e-12, atol=1e-12)

    limit = 0.15
    limits = Limits(
        input_min=np.full(2, -limit) + u,
        input_max=np.full(2, limit) + u,
        move_max=np.full(2, np.inf),
        output_min=np.full(2, -np.inf),
        output_max=np.full(2, np.inf),
        output_softness=np.full(2, 1e3),
    )
    solution = blocked_qp(limits).solve(error=error, free_prediction=free, previous_input=u, terminal_error=e_t)
    # the cost written out: 0.5 dU' H dU - (G' W E + Gamma' P e_t)' dU with the Hessian formed
    # by hand, H = G' W G + R (one move weight per free move) + Gamma' P Gamma
    hessian = g.T @ weights @ g + np.kron(np.eye(3), np.diag(R)) + gamma.T @ p_t @ gamma

    def cost(du):
        return 0.5 * du @ hessian @ du - expected @ du

    # |u + cumulative moves| within the limit around u at every free move
    steps = np.kron(np.tril(np.ones((3, 3))), np.eye(2))
    bounds = [
        {"type": "ineq", "fun": lambda du: limit - steps @ du},
        {"type": "ineq", "fun": lambda du: limit + steps @ du},
    ]
    best = minimize(
        cost,
        np.zeros(free_moves),
        jac=lambda du: hessian @ du - expected,
        constraints=bounds,
        method="SLSQP",
        options={"ftol": 1e-14, "maxiter": 500},
    )
    assert best.success
    np.testing.assert_allclose(solution.moves[:free_moves], best.x, atol=1e-6)
    assert np.abs(steps @ solution.moves[:free_moves]).max() <= limit + 1e-9
