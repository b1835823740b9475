"""The move QP under limits: optimality, limits in closed loop, the unconstrained special case."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.evaluation.simulation import Event, Scenario, UnconstrainedPolicy, simulate_loop
from service.solver.limits.bounds import Limits, limit_violations, make_limits
from service.solver.limits.policy import ConstrainedPolicy
from service.solver.limits.qp import MoveProblem, MoveQP
from tests.conftest import random_plant

N, M, P, HP, HU = 4, 2, 2, 12, 4


def small_design(rng, *, n=N, m=M, p=P, hp=HP, hu=HU, radius=0.9):
    a, b, c = random_plant(rng, n, m, p, radius=radius)
    design = design_controller(
        a,
        b,
        c,
        output_weight=rng.uniform(0.5, 2.0, p),
        move_weight=rng.uniform(0.05, 0.5, m),
        prediction=hp,
        control=hu,
    )
    return a, b, c, design


def random_step(rng, design, *, scale=3.0):
    """Error, free prediction and previous input of a step with a random state and setpoint."""
    pred = design.prediction
    x = rng.normal(size=pred.free_state.shape[1]) * scale
    u = rng.uniform(-0.5, 0.5, pred.free_input.shape[1])
    free = pred.free_state @ x + pred.free_input @ u
    r = rng.normal(size=design.output_weight.shape[0]) * scale
    return np.tile(r, pred.penalized_steps) - free, free, u


def with_general_rows(problem: MoveProblem) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``[I; rows]`` and the bounds on it: every constraint of the QP as ``lower <= A x <= upper``."""
    nv = problem.hessian.shape[0]
    return np.vstack([np.eye(nv), problem.rows]), problem.lower, problem.upper


def reference_solution(problem: MoveProblem) -> np.ndarray:
    """The same QP solved by scipy.optimize.minimize(method='trust-constr'), an interior-point /
    SQP trust-region method independent of DAQP (scipy is the reference library)."""
    nv = problem.hessian.shape[0]
    h, f = problem.hessian, problem.linear
    result = scipy.optimize.minimize(
        lambda z: 0.5 * z @ h @ z + f @ z,
        np.zeros(nv),
        jac=lambda z: h @ z + f,
        hess=lambda z: h,
        method="trust-constr",
        bounds=scipy.optimize.Bounds(problem.lower[:nv], problem.upper[:nv]),
        constraints=[scipy.optimize.LinearConstraint(problem.rows, problem.lower[nv:], problem.upper[nv:])],
        options={"gtol": 1e-12, "xtol": 1e-14, "maxiter": 5000},
    )
    return result.x


def active_limits_setup(rng):
    _, _, _, design = small_design(rng)
    limits = make_limits(
        M, P, input_min=-1.0, input_max=1.0, move_max=0.4, output_max=[2.0, np.nan], output_min=[np.nan, -2.5]
    )
    return design, limits


@pytest.mark.parametrize("seed", range(6))
def test_solution_satisfies_the_kkt_conditions(seed):
    # Karush-Kuhn-Tucker conditions of a convex QP (necessary and sufficient for optimality;
    # common practice): stationarity H x + f + A' lambda = 0, primal feasibility, the sign of
    # each multiplier (DAQP's convention: positive at an upper bound, negative at a lower),
    # complementary slackness lambda_i (a_i x - bound_i) = 0.
    rng = np.random.default_rng(seed)
    design, limits = active_limits_setup(rng)
    qp = MoveQP.from_design(design, limits, warm_start="none")
    actives = 0
    for _ in range(5):
        error, free, u = random_step(rng, design)
        solution = qp.solve(error=error, free_prediction=free, previous_input=u)
        assert solution.solved, solution.status
        problem = qp.problem(error=error, free_prediction=free, previous_input=u)
        a, lower, upper = with_general_rows(problem)
        x, lam = solution.variables, solution.multipliers
        scale = max(1.0, np.abs(problem.linear).max())
        np.testing.assert_allclose(problem.hessian @ x + problem.linear + a.T @ lam, 0.0, atol=1e-9 * scale)
        value = a @ x
        assert np.all(value <= upper + 1e-9) and np.all(value >= lower - 1e-9)
        assert np.all(np.isfinite(upper[lam > 0])) and np.all(np.isfinite(lower[lam < 0]))
        gap = np.where(lam > 0, value - upper, np.where(lam < 0, value - lower, 0.0))
        np.testing.assert_allclose(lam * gap, 0.0, atol=1e-9 * scale)
        actives += len(solution.active)
    assert actives > 0  # the draws do press on limits


@pytest.mark.parametrize("seed", range(4))
def test_solution_agrees_with_scipy_trust_constr(seed):
    # Reference: scipy.optimize.minimize(method="trust-constr") on the same QP.  The first
    # move must agree to 1e-6 (the accuracy target) and the cost to 1e-9 relative.
    rng = np.random.default_rng(100 + seed)
    design, limits = active_limits_setup(rng)
    qp = MoveQP.from_design(design, limits)
    error, free, u = random_step(rng, design)
    solution = qp.solve(error=error, free_prediction=free, previous_input=u)
    problem = qp.problem(error=error, free_prediction=free, previous_input=u)
    reference = reference_solution(problem)
    assert solution.active
    np.testing.assert_allclose(solution.moves[:M], reference[:M], atol=1e-6)

    def cost(z):
        return 0.5 * z @ problem.hessian @ z + problem.linear @ z

    assert cost(solution.variables) == pytest.approx(cost(reference), rel=1e-9, abs=1e-9)


def test_unconstrained_optimum_when_the_limits_are_wide(rng):
    # Design notes: without active limits the QP's minimizer is H^-1 G'QE, whose first move is
    # Kh E (service.solver.design.gain); the QP must not be a different controller.
    _, _, _, design = small_design(rng)
    limits = make_limits(M, P, input_min=-1e6, input_max=1e6, move_max=1e6, output_min=-1e6, output_max=1e6)
    qp = MoveQP.from_design(design, limits)
    for _ in range(5):
        error, free, u = random_step(rng, design)
        solution = qp.solve(error=error, free_prediction=free, previous_input=u)
        assert solution.solved and not solution.active
        np.testing.assert_allclose(solution.moves[:M], design.gain.horizon @ error, rtol=1e-12, atol=1e-12)


class Recorder:
    """Wraps a policy and keeps what it saw and answered."""

    def __init__(self, policy):
        self.policy, self.errors, self.moves, self.reports = policy, [], [], []

    def __call__(self, **kwargs):
        result = self.policy(**kwargs)
        self.errors.append(kwargs["error"].copy())
        self.moves.append(np.asarray(result.move).copy())
        self.reports.append(result.report)
        return result


def saturating_run(rng, limits: Limits, *, steps=40, back_at=None):
    """A full-state run with a setpoint step well beyond the limits (and back, if asked)."""
    a, b, c, design = small_design(rng)
    estimator = design_estimator(a, b, c, kind="full_state")
    events = [Event(0, np.array([4.0, -3.0]))]
    if back_at is not None:
        events.append(Event(back_at, np.array([0.2, -0.1])))
    scenario = Scenario(steps=steps, setpoint_changes=events)
    policy = Recorder(ConstrainedPolicy.from_design(design, limits))
    return design, simulate_loop(design, estimator, scenario, policy=policy), policy


def test_first_move_is_the_gain_move_whenever_no_limit_is_active(rng):
    # The requirement: with no active limit the QP's first move equals the fixed gain's
    # move Kh E to solver tolerance; a run that starts on the limits and leaves them covers both
    # the solver's path and the shortcut.
    limits = make_limits(M, P, input_min=-1.5, input_max=1.5, move_max=0.6)
    design, sim, policy = saturating_run(rng, limits, steps=60, back_at=25)
    free_steps = [k for k, r in enumerate(policy.reports) if not r.active_limits]
    busy_steps = [k for k, r in enumerate(policy.reports) if r.active_limits]
    assert free_steps and busy_steps
    for k in free_steps:
        np.testing.assert_allclose(policy.moves[k], design.gain.horizon @ policy.errors[k], atol=1e-9)
    assert any(np.abs(policy.moves[k] - design.gain.horizon @ policy.errors[k]).max() > 1e-3 for k in busy_steps)


def test_limits_hold_at_every_step(rng):
    # Inputs and moves within their hard limits at every step; each controlled output within
    # its soft limits plus the slack the QP reported one step earlier (with the state known and
    # no mismatch the one-step prediction is exact).
    limits = make_limits(
        M, P, input_min=[-1.0, -0.8], input_max=[1.0, 0.8], move_max=[0.3, 0.2], output_max=[3.0, np.nan]
    )
    design, sim, policy = saturating_run(rng, limits, steps=50)
    violation = limit_violations(limits, inputs=sim.inputs, previous_input=sim.initial_input)
    assert violation.input.max() <= 1e-9 and violation.move.max() <= 1e-9
    assert all(r.solved for r in sim.reports)
    for k in range(sim.outputs.shape[0] - 1):
        slack = sim.reports[k].output_max_slack
        assert np.all(sim.outputs[k + 1] <= limits.output_max + slack + 1e-9)
    seen = {(a.kind, a.side) for r in sim.reports for a in r.active_limits}
    assert ("move", "max") in seen or ("move", "min") in seen
    assert any(r.inputs_at_max or r.inputs_at_min for r in sim.reports)


def test_wide_limits_give_the_unconstrained_trajectory(rng):
    # The fixed gain is the special case: limits that never bind give the same run as
    # UnconstrainedPolicy (service.solver.evaluation.simulation), to rounding.
    a, b, c, design = small_design(rng)
    estimator = design_estimator(a, b, c, kind="output_disturbance")
    scenario = Scenario(
        steps=40,
        setpoint_changes=[Event(0, np.array([1.0, -0.5]))],
        output_disturbances=[Event(20, np.array([0.2, 0.1]))],
        noise_std=np.array([0.01, 0.01]),
        seed=3,
    )
    wide = make_limits(M, P, input_min=-1e6, input_max=1e6, move_max=1e6, output_min=-1e6, output_max=1e6)
    free = simulate_loop(design, estimator, scenario, policy=UnconstrainedPolicy(design.gain.horizon))
    limited = simulate_loop(design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, wide))
    np.testing.assert_allclose(limited.inputs, free.inputs, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(limited.outputs, free.outputs, rtol=1e-12, atol=1e-12)
    assert all(not r.active_limits and r.method == "unconstrained" for r in limited.reports)


def test_exact_penalty_gives_the_hard_solution_above_the_multiplier_sum(rng):
    # Exact l1 penalty (a standard result of constrained optimization; common practice): with
    # a feasible hard problem and a penalty above the dual norm of its multipliers -- here, one
    # slack per bound shared over the horizon, the sum of the bound's multipliers -- the soft
    # problem has the hard one's solution; below it, it does not.  The hard problem's multipliers
    # come from the same solver, checked by the KKT test above.
    _, _, _, design = small_design(rng)
    base = {"input_min": -3.0, "input_max": 3.0, "output_max": [0.5, np.nan]}
    hard_qp = MoveQP.from_design(design, make_limits(M, P, **base), hard_outputs=True)
    pred = design.prediction
    free = np.zeros(pred.penalized_steps * P)
    error = np.tile([2.0, 0.0], pred.penalized_steps)  # asks output 1 well above its limit
    hard = hard_qp.solve(error=error, free_prediction=free, previous_input=np.zeros(M))
    assert hard.solved and any(a.kind == "output" for a in hard.active)
    needed = float(np.abs(hard.multipliers[hard_qp.blocks["output_max"]]).sum())
    assert needed > 0.0

    above = MoveQP.from_design(design, make_limits(M, P, output_softness=2.0 * needed, **base))
    soft = above.solve(error=error, free_prediction=free, previous_input=np.zeros(M))
    np.testing.assert_allclose(soft.moves, hard.moves, atol=1e-9)
    assert soft.output_max_slack[0] == 0.0

    below = MoveQP.from_design(design, make_limits(M, P, output_softness=0.5 * needed, **base))
    cheap = below.solve(error=error, free_prediction=free, previous_input=np.zeros(M))
    assert cheap.output_max_slack[0] > 1e-6
    assert np.abs(cheap.moves - hard.moves).max() > 1e-6


def test_unreachable_input_limits_fall_back_to_holding_the_input(rng):
    # The issue: an infeasible solve never crashes the run; the step holds the last input and
    # is flagged.  u(-1) = 2 above input_max = 1 with moves of at most 0.1: no move sequence
    # meets the limit at step 0, so the QP is infeasible.
    a, b, c, design = small_design(rng)
    limits = make_limits(M, P, input_min=-1.0, input_max=1.0, move_max=0.1)
    policy = ConstrainedPolicy.from_design(design, limits)
    error, free, _ = random_step(rng, design)
    step = policy(error=error, free_prediction=free, previous_input=np.array([2.0, 0.0]), step=0)
    np.testing.assert_array_equal(step.move, np.zeros(M))
    assert step.report.fallback and step.report.status == "infeasible"
    estimator = design_estimator(a, b, c, kind="full_state")
    scenario = Scenario(steps=30, initial_input=np.array([1.5, 0.0]), setpoint_changes=[Event(0, np.zeros(P))])
    sim = simulate_loop(design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, limits))
    # Held outside its limit, the input stays there: every step is a flagged fallback, and the
    # run goes to its end.
    assert sim.diverged_at is None and all(r.fallback for r in sim.reports)
    np.testing.assert_array_equal(sim.inputs, np.tile([1.5, 0.0], (30, 1)))


def test_non_finite_data_is_a_flagged_fallback(rng):
    _, _, _, design = small_design(rng)
    policy = ConstrainedPolicy.from_design(design, make_limits(M, P, move_max=0.5))
    error, free, u = random_step(rng, design)
    error[3] = np.nan
    step = policy(error=error, free_prediction=free, previous_input=u, step=0)
    np.testing.assert_array_equal(step.move, np.zeros(M))
    assert step.report.fallback and step.report.status == "failed"


def test_infeasible_hard_output_limits_fall_back(rng):
    # Hard output limits that no move within the move limits can meet (the free prediction is
    # already far above them): infeasible, flagged, never raised.
    _, _, _, design = small_design(rng)
    qp = MoveQP.from_design(design, make_limits(M, P, move_max=0.01, output_max=[0.0, 0.0]), hard_outputs=True)
    free = np.full(design.prediction.penalized_steps * P, 100.0)
    solution = qp.solve(error=-free, free_prediction=free, previous_input=np.zeros(M))
    assert not solution.solved and solution.status == "infeasible"
    np.testing.assert_array_equal(solution.moves, 0.0)


@pytest.mark.parametrize("warm_start", ["previous", "shifted"])
def test_warm_start_finds_the_cold_solution(rng, warm_start):
    # A warm start is only a starting guess: warm and cold runs must agree.
    a, b, c, design = small_design(rng)
    limits = make_limits(M, P, input_min=-1.0, input_max=1.0, move_max=0.3, output_max=[2.0, 2.0])
    estimator = design_estimator(a, b, c, kind="full_state")
    scenario = Scenario(steps=40, setpoint_changes=[Event(0, np.array([4.0, -3.0])), Event(20, np.array([-2.0, 1.0]))])
    warm = simulate_loop(
        design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, limits, warm_start=warm_start)
    )
    cold = simulate_loop(
        design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, limits, warm_start="none")
    )
    np.testing.assert_allclose(warm.inputs, cold.inputs, atol=1e-9)


def test_limits_accept_nan_and_none_for_no_limit():
    limits = make_limits(2, 2, input_min=[np.nan, -1.0], move_max=None, output_max=[1.0, np.nan], output_softness=7.0)
    assert limits.input_min.tolist() == [-np.inf, -1.0] and limits.input_max.tolist() == [np.inf, np.inf]
    assert limits.move_max.tolist() == [np.inf, np.inf] and limits.output_softness.tolist() == [7.0, 7.0]
    assert limits.has_input_limits and not limits.has_move_limits and limits.has_output_limits
    assert not make_limits(1, 1).any
    violation = limit_violations(
        limits, inputs=[[0.0, -1.5], [0.0, 0.0]], previous_input=[0.0, 0.0], outputs=[[1.25, 9.0], [0.0, 0.0]]
    )
    assert violation.input.tolist() == [0.0, 0.5] and violation.output.tolist() == [0.25, 0.0]


def _delayed_lag(delay: int = 4):
    """y(k+1) = 0.9 y(k) + 0.1 u(k - delay): a first-order lag behind a shift register (invented)."""
    n = delay + 1
    a = np.zeros((n, n))
    a[0, 0], a[0, n - 1] = 0.9, 0.1  # the lag reads the register's oldest sample
    a[2:, 1:-1] += np.eye(n - 2)  # the register shifts one sample per step
    b = np.zeros((n, 1))
    b[1, 0] = 1.0
    c = np.zeros((1, n))
    c[0, 0] = 1.0
    return a, b, c


def test_output_limits_inside_the_dead_time_are_left_out(rng):
    # A disturbance holds the output at 1.3 above its limit 1.0: inside the dead time no move
    # can change that (G's rows are zero there: u(k) reaches y first at k + delay + 1), so
    # only the steps the moves reach are limited (common practice: the limits' window starts
    # past the dead time).  Reference: scipy's trust-constr on the hard problem of those rows.
    a, b, c = _delayed_lag()
    design = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.1], prediction=20, control=4)
    g = design.prediction.moves
    reached = np.abs(g).max(axis=1) > 0.0
    assert not reached[:4].any() and reached[4:].all()  # the dead time, by the realization
    steps = design.prediction.penalized_steps
    free = np.full(steps, 1.3)
    error = np.full(steps, 1.1) - free  # a setpoint above the limit pulls the output up
    nv, rows = g.shape[1], int(reached.sum())
    reference_problem = MoveProblem(
        design.hessian.matrix,
        -(g.T @ error),  # the cost's linear term -G'QE (Q = 1)
        g[reached],
        np.full(nv + rows, -np.inf),
        np.concatenate([np.full(nv, np.inf), 1.0 - free[reached]]),
    )
    for hard in (True, False):
        qp = MoveQP.from_design(design, make_limits(1, 1, output_max=[1.0], output_softness=1e3), hard_outputs=hard)
        solution = qp.solve(error=error, free_prediction=free, previous_input=np.zeros(1))
        assert solution.solved, solution.status  # a hard QP had been infeasible: the inputs froze
        planned = free + g @ solution.moves
        assert planned[reached].max() <= 1.0 + 1e-7
        assert solution.output_max_slack[0] == 0.0  # the reachable steps keep the limit
        reference = reference_solution(reference_problem)  # an interior point: close, not exact

        def cost(z):
            return 0.5 * z @ reference_problem.hessian @ z + reference_problem.linear @ z

        nu = solution.moves.size
        assert cost(solution.moves) <= cost(reference) + 1e-9 * abs(cost(reference))
        np.testing.assert_allclose(solution.moves, reference[:nu], atol=1e-4)


def test_a_limit_on_an_output_in_tiny_units_is_kept():
    # Two loops in units 1e20 apart (invented): u1 moves y1 by 1e10 per unit, u2 moves y2 by
    # 1e-10, each weighed in its own units.  Whether a move reaches a row is judged against
    # the same output's rows, so y2's limit holds at every step (checked on the plan itself:
    # the free prediction plus G dU, the definition of the prediction).
    a, b, c = np.diag([0.5, 0.5]), np.diag([1e10, 1e-10]), np.eye(2)
    design = design_controller(a, b, c, output_weight=[1e-20, 1e20], move_weight=[0.1, 0.1], prediction=10, control=3)
    steps = design.prediction.penalized_steps
    free = np.tile([0.0, 0.5], steps)  # y2 predicted below its limit of 1 ...
    error = np.tile([0.0, 3.0], steps) - free  # ... and a setpoint of 3 pulling it above
    qp = MoveQP.from_design(design, make_limits(2, 2, output_max=[np.nan, 1.0]), hard_outputs=True)
    solution = qp.solve(error=error, free_prediction=free, previous_input=np.zeros(2))
    assert solution.solved, solution.status
    planned = (free + design.prediction.moves @ solution.moves).reshape(steps, 2)
    assert planned[:, 1].max() <= 1.0 + 1e-9
