"""A run under limits: the target-rule hook of the loop, the exact fixed-gain special case,
the reachable target step by step, and the nominal check of the unconstrained law.

Sources named beside each check: the control law of the design notes
``du(k) = Kr r - Kx x(k) - Ku u(k-1)``; the steady state ``x_s = (I - A)^-1 B u_s`` of a stable
plant (common practice) with ``scipy.optimize.lsq_linear`` (bounded least squares, scipy as
the reference library) for the nearest reachable steady state in the ``Q``-weighted sense.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop
from service.solver.evaluation.simulation import Event, Scenario, UnconstrainedPolicy, simulate_loop
from service.solver.limits.bounds import limit_violations, make_limits
from service.solver.limits.limited_run import (
    GainWhenFreePolicy,
    ReachableTargetRule,
    limit_excursions,
    nominal_setpoint_run,
)
from service.solver.limits.policy import ConstrainedPolicy
from tests.conftest import random_plant

N, M, P = 4, 2, 2


def setup(rng, kind="output_disturbance"):
    a, b, c = random_plant(rng, N, M, P, radius=0.85)
    design = design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.1, 0.3], prediction=25, control=4)
    estimator = design_estimator(a, b, c, kind=kind)
    return a, b, c, design, estimator


SCENARIO = Scenario(
    steps=60,
    setpoint_changes=[Event(3, np.array([1.0, -0.5]))],
    output_disturbances=[Event(30, np.array([0.2, -0.1]))],
    noise_std=np.array([0.01, 0.02]),
    seed=7,
)


class Recording:
    """A target rule that answers with the loop's own linear maps and keeps its arguments."""

    def __init__(self, loop):
        self.loop, self.calls = loop, []

    def __call__(self, *, setpoint, disturbance):
        self.calls.append((setpoint.copy(), disturbance.copy()))
        t, n = self.loop.target, self.loop.estimator.state_size
        return (
            t.output_setpoint_map @ setpoint + t.output_disturbance_map @ disturbance,
            t.setpoint_map[n:] @ setpoint + t.disturbance_map[n:] @ disturbance,
        )


def test_the_target_rule_is_called_once_per_step_with_setpoint_and_disturbance_estimate(rng):
    # The loop's notes: z_s(k) = Z_r r(k) + Z_d d(k|k).  A rule that computes exactly that
    # reproduces the default run, and it sees r(k) and the disturbance part of x(k|k).
    _, _, _, design, estimator = setup(rng)
    loop = control_loop(design, estimator)
    rule = Recording(loop)
    default = simulate_loop(design, estimator, SCENARIO, loop=loop)
    ruled = simulate_loop(design, estimator, SCENARIO, loop=loop, target_rule=rule)
    assert len(rule.calls) == SCENARIO.steps
    for k, (setpoint, disturbance) in enumerate(rule.calls):
        np.testing.assert_array_equal(setpoint, default.setpoints[k])
        # the default run is the fixed law's linear recursion, equal to the step loop to rounding
        np.testing.assert_allclose(disturbance, default.disturbance_estimates[k], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(ruled.inputs, default.inputs, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(ruled.targets, default.targets, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("kind", ["full_state", "output_disturbance"])
def test_limits_out_of_the_way_give_the_fixed_gain_run(rng, kind):
    # The fixed gain is the special case of the constrained controller: with limits that
    # never bind, the policy applies Kh E itself and the target rule the loop's own maps, so
    # the run is UnconstrainedPolicy's.  That one runs as a single linear recursion (the
    # products grouped once for all steps), so the two agree to rounding, not to the last bit.
    _, _, _, design, estimator = setup(rng, kind)
    loop = control_loop(design, estimator)
    wide = make_limits(M, P, input_min=-1e6, input_max=1e6, move_max=1e6, output_min=-1e6, output_max=1e6)
    free = simulate_loop(design, estimator, SCENARIO, loop=loop, policy=UnconstrainedPolicy(design.gain.horizon))
    policy = GainWhenFreePolicy(ConstrainedPolicy.from_design(design, wide), design.gain.horizon)
    rule = ReachableTargetRule.from_loop(loop, wide)
    limited = simulate_loop(design, estimator, SCENARIO, loop=loop, policy=policy, target_rule=rule)
    for got, want in (
        (limited.inputs, free.inputs),
        (limited.outputs, free.outputs),
        (limited.estimates, free.estimates),
    ):
        np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-13)
    assert rule.statuses == ["unconstrained"] * SCENARIO.steps


def test_busy_steps_keep_the_qp_s_move(rng):
    # Where a limit is in the way the wrapper must not touch the QP's move.
    _, _, _, design, estimator = setup(rng, "full_state")
    limits = make_limits(M, P, input_min=-0.3, input_max=0.3, move_max=0.1)
    scenario = Scenario(steps=40, setpoint_changes=[Event(0, np.array([3.0, -2.0]))])
    plain = simulate_loop(design, estimator, scenario, policy=ConstrainedPolicy.from_design(design, limits))
    wrapped = simulate_loop(
        design,
        estimator,
        scenario,
        policy=GainWhenFreePolicy(ConstrainedPolicy.from_design(design, limits), design.gain.horizon),
    )
    busy = [k for k, r in enumerate(plain.reports) if r.method == "active_set"]
    assert busy and busy[0] == 0
    np.testing.assert_array_equal(wrapped.moves[busy[0]], plain.moves[busy[0]])
    np.testing.assert_allclose(wrapped.inputs, plain.inputs, atol=1e-9)
    assert np.all(np.abs(wrapped.inputs) <= 0.3 + 1e-9)


def test_the_rule_aims_at_the_bounded_least_squares_steady_state(rng):
    # Reference: min |W (G_ss u - r)| subject to the input limits (W'W = Q), G_ss = C (I - A)^-1 B,
    # by scipy.optimize.lsq_linear; the rule's target outputs are G_ss u_s for that u_s.
    a, b, c, design, estimator = setup(rng, "full_state")
    loop = control_loop(design, estimator)
    limits = make_limits(M, P, input_min=-0.4, input_max=0.4)
    gain = c @ np.linalg.solve(np.eye(N) - a, b)
    r = 3.0 * np.abs(gain).sum(axis=1)
    rule = ReachableTargetRule.from_loop(loop, limits)
    output, inputs = rule(setpoint=r, disturbance=np.zeros(0))
    weight = np.diag(np.sqrt([1.0, 2.0]))
    reference = scipy.optimize.lsq_linear(weight @ gain, weight @ r, bounds=(-0.4, 0.4), method="bvls", tol=1e-14)
    np.testing.assert_allclose(inputs, reference.x, atol=1e-8)
    np.testing.assert_allclose(output, gain @ reference.x, atol=1e-8)
    assert rule.statuses == ["optimal"] and rule.reachable == [False]


def test_the_nominal_run_is_the_design_law_by_hand(rng):
    # du(k) = Kr r - Kx x(k) - Ku u(k-1) on x+ = A x + B u from rest (the design notes).
    a, b, c, design, _ = setup(rng)
    r = np.array([1.0, -2.0])
    run = nominal_setpoint_run(a, b, c, design.gain, setpoint=r, steps=25)
    x, u = np.zeros(N), np.zeros(M)
    g = design.gain
    for k in range(25):
        u = u + g.setpoint @ r - g.state @ x - g.previous_input @ u
        x = a @ x + b @ u
        np.testing.assert_allclose(run.inputs[k], u, rtol=1e-12, atol=1e-13)
        np.testing.assert_allclose(run.outputs[k], c @ x, rtol=1e-12, atol=1e-13)
    assert run.completed


def test_an_unstable_law_is_cut_before_it_overflows():
    # x+ = 3 x + u with a law that cannot hold it (a zero gain on the state): the run stops
    # while every number is still finite.
    from service.solver.design.gain import PredictiveGain

    zero = PredictiveGain(
        horizon=np.zeros((1, 1)), state=np.zeros((1, 1)), previous_input=np.zeros((1, 1)), setpoint=np.ones((1, 1))
    )
    run = nominal_setpoint_run([[3.0]], [[1.0]], [[1.0]], zero, setpoint=[1.0], steps=2000)
    assert not run.completed and 0 < run.inputs.shape[0] < 2000
    assert np.isfinite(run.outputs).all()


def test_excursions_by_hand_and_against_limit_violations():
    # By hand: the input passes its maximum 1 by 0.5 at step 2, the move passes -0.6 by 0.4 at
    # step 3 (1.5 -> 0.5), the output passes its minimum -1 by 1 at its row 1 (step 2 with
    # first_output_step=1).  Every excursion is the largest excess that limit_violations finds.
    limits = make_limits(1, 1, input_max=1.0, move_max=0.6, output_min=-1.0)
    u = np.array([[0.4], [0.9], [1.5], [0.5]])
    z = np.array([[0.0], [-2.0], [-0.5], [0.1]])
    found = limit_excursions(limits, inputs=u, previous_input=[0.0], outputs=z, first_output_step=1)
    assert [(e.kind, e.side, e.index, e.step) for e in found] == [
        ("input", "max", 0, 2),
        ("move", "min", 0, 3),
        ("output", "min", 0, 2),
    ]
    assert [(e.value, e.limit) for e in found] == [(1.5, 1.0), (-1.0, -0.6), (-2.0, -1.0)]
    worst = limit_violations(limits, inputs=u, previous_input=[0.0], outputs=z)
    assert worst.input[0] == pytest.approx(0.5) and worst.move[0] == pytest.approx(0.4) and worst.output[0] == 1.0
    assert limit_excursions(make_limits(1, 1, input_max=2.0), inputs=u, previous_input=[0.0], outputs=z) == ()


@pytest.mark.parametrize("kind", ["full_state", "output_disturbance"])
def test_a_measured_disturbance_moves_the_reachable_target(rng, kind):
    # A held measured disturbance d_m changes the steady state the inputs can reach:
    # x_s = (I - A)^-1 (B u_s + Bd d_m).  Reference: min |W (G_ss u + G_m d_m - r)| subject to the
    # input limits (scipy.optimize.lsq_linear, bounded least squares), G_m = C (I - A)^-1 Bd.
    # The setpoint is reachable before the disturbance and not after it: the rule must say so
    # and the loop must settle on the reference, not push against the limit for the setpoint.
    a, b, c, design, estimator = setup(rng, kind)
    bd = rng.standard_normal((N, 1))
    loop = control_loop(design, estimator)
    limits = make_limits(M, P, input_min=-0.4, input_max=0.4)
    gain = c @ np.linalg.solve(np.eye(N) - a, b)
    g_m = c @ np.linalg.solve(np.eye(N) - a, bd)
    r = gain @ np.array([0.2, -0.2])  # reachable with both inputs inside +-0.4
    # a disturbance whose rejection alone needs an input of about 1.6 (four times the limit)
    d_m = np.array([1.6 / np.abs(np.linalg.solve(gain, g_m)).max()])
    scenario = Scenario(steps=300, setpoint_changes=[Event(0, r)], measured_disturbances=[Event(100, d_m)])
    rule = ReachableTargetRule.from_loop(loop, limits, b_disturbance=bd)
    policy = GainWhenFreePolicy(ConstrainedPolicy.from_design(design, limits), design.gain.horizon)
    sim = simulate_loop(design, estimator, scenario, loop=loop, policy=policy, target_rule=rule, b_disturbance=bd)
    weight = np.diag(np.sqrt([1.0, 2.0]))
    reference = scipy.optimize.lsq_linear(
        weight @ gain, weight @ (r - g_m @ d_m), bounds=(-0.4, 0.4), method="bvls", tol=1e-14
    )
    assert rule.reachable[99] and not rule.reachable[-1]
    np.testing.assert_allclose(sim.inputs[-1], reference.x, atol=1e-6)
    np.testing.assert_allclose(sim.outputs[-1], gain @ reference.x + g_m @ d_m, atol=1e-6)
    np.testing.assert_allclose(sim.targets[-1], gain @ reference.x + g_m @ d_m, atol=1e-8)
