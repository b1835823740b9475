"""Zones in the move QP: weighted only outside the range, checked against scipy and by hand."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from service.solver.design.controller import design_controller
from service.solver.limits.bounds import make_limits
from service.solver.limits.qp import MoveQP
from service.solver.limits.zones import make_zones, zone_record
from tests.conftest import random_plant

N, M, P, HP, HU = 4, 2, 2, 10, 3


def zone_design(rng, *, zone_weight=0.0):
    """A small random plant whose output 0 carries ``zone_weight`` in Q (0: a zone output)."""
    a, b, c = random_plant(rng, N, M, P, radius=0.9)
    q = np.array([zone_weight, rng.uniform(0.5, 2.0)])
    r = rng.uniform(0.05, 0.5, M)
    design = design_controller(a, b, c, output_weight=q, move_weight=r, prediction=HP, control=HU)
    return (a, b, c, q, r), design


def step_data(rng, design, *, scale=3.0):
    pred = design.prediction
    x = rng.normal(size=pred.free_state.shape[1]) * scale
    u = rng.uniform(-0.5, 0.5, M)
    free = pred.free_state @ x + pred.free_input @ u
    setpoint = rng.normal(size=P) * scale
    return np.tile(setpoint, pred.penalized_steps) - free, free, u


def dense_reference(design, zones, limits, *, error, free, previous):
    """The zone QP written without slacks, in the moves alone, solved by scipy (SLSQP).

    Cost: 1/2 |W (G dU - E)|^2 + 1/2 dU' R dU + 1/2 sum_i w dist(Zfree_i + (G dU)_i, [low, high])^2,
    a convex, continuously differentiable piecewise quadratic, with the move limits as bounds
    and the input limits as linear inequalities; built densely from the prediction matrices.
    scipy.optimize.minimize is the reference library; the formulation is independent of the
    slack rows of service.solver.limits.qp.
    """
    pred = design.prediction
    g = pred.moves
    q = np.tile(np.diag(np.atleast_2d(design.output_weight)), pred.penalized_steps)
    r = np.kron(np.eye(HU), np.atleast_2d(design.move_weight))
    zoned = zones.zoned
    rows = (np.arange(pred.penalized_steps)[:, None] * P + zoned[None, :]).reshape(-1)
    low = np.tile(zones.low[zoned], pred.penalized_steps)
    high = np.tile(zones.high[zoned], pred.penalized_steps)
    w = np.tile(zones.weight[zoned], pred.penalized_steps)

    def cost(du):
        e = g @ du - error
        z = free[rows] + g[rows] @ du
        dist = np.maximum(0.0, np.maximum(z - high, low - z))
        return 0.5 * e @ (q * e) + 0.5 * du @ r @ du + 0.5 * w @ dist**2

    def grad(du):
        e = g @ du - error
        z = free[rows] + g[rows] @ du
        over = np.maximum(0.0, z - high) - np.maximum(0.0, low - z)
        return g.T @ (q * e) + r @ du + g[rows].T @ (w * over)

    cumulative = np.kron(np.tril(np.ones((HU, HU))), np.eye(M))
    constraints = []
    if np.isfinite(limits.input_max).any():
        top = np.tile(limits.input_max - previous, HU)
        bottom = np.tile(previous - limits.input_min, HU)
        constraints = [
            {"type": "ineq", "fun": lambda du: top - cumulative @ du, "jac": lambda du: -cumulative},
            {"type": "ineq", "fun": lambda du: bottom + cumulative @ du, "jac": lambda du: cumulative},
        ]
    bounds = [(-mm, mm) for mm in np.tile(limits.move_max, HU)]
    result = scipy.optimize.minimize(
        cost,
        np.zeros(HU * M),
        jac=grad,
        method="SLSQP",
        bounds=bounds,
        constraints=constraints,
        options={"ftol": 1e-15, "maxiter": 2000},
    )
    assert result.success, result.message
    return result.x, cost


@pytest.mark.parametrize("seed", range(5))
def test_zone_qp_agrees_with_a_dense_scipy_formulation(seed):
    rng = np.random.default_rng(300 + seed)
    _, design = zone_design(rng)
    zones = make_zones(P, low=[-0.5, np.nan], high=[0.5, np.nan], weight=[3.0, 0.0])
    limits = make_limits(M, P, input_min=-2.0, input_max=2.0, move_max=0.6)
    qp = MoveQP.from_design(design, limits, zones=zones, warm_start="none")
    outside = 0
    for _ in range(4):
        error, free, u = step_data(rng, design)
        solution = qp.solve(error=error, free_prediction=free, previous_input=u)
        assert solution.solved, solution.status
        reference, cost = dense_reference(design, zones, limits, error=error, free=free, previous=u)
        np.testing.assert_allclose(solution.moves, reference, atol=2e-6)
        assert cost(solution.moves) <= cost(reference) + 1e-9 * max(1.0, abs(cost(reference)))
        outside += solution.method == "active_set"
    assert outside > 0  # the draws do leave the zone


def test_zone_slacks_are_the_distance_outside_the_zone(rng):
    # At the optimum each zone slack is max(0, z - high, low - z) of its predicted output
    # (epigraph form of the squared distance; by hand).
    _, design = zone_design(rng)
    zones = make_zones(P, low=[-0.2, np.nan], high=[0.3, np.nan], weight=[2.0, 0.0])
    qp = MoveQP.from_design(design, make_limits(M, P), zones=zones)
    error, free, u = step_data(rng, design, scale=5.0)
    solution = qp.solve(error=error, free_prediction=free, previous_input=u)
    assert solution.solved and solution.method == "active_set"
    z = (free + design.prediction.moves @ solution.moves).reshape(-1, P)[:, 0]
    t = solution.variables[qp.blocks["zone_slacks"]]
    np.testing.assert_allclose(t, np.maximum(0.0, np.maximum(z - 0.3, -0.2 - z)), atol=1e-9)
    assert t.max() > 1e-3


def test_a_zone_of_zero_width_is_the_setpoint(rng):
    # With low = high = r the zone cost 1/2 w (z - r)^2 is the setpoint cost of an output of
    # weight w (by hand), so the QP's moves equal the unconstrained law of that design, Kh E.
    (a, b, c, q, r), zoned = zone_design(rng)
    tracked = design_controller(a, b, c, output_weight=[2.5, q[1]], move_weight=r, prediction=HP, control=HU)
    setpoint = np.array([0.7, -0.4])
    qp = MoveQP.from_design(
        zoned, make_limits(M, P), zones=make_zones(P, low=[0.7, np.nan], high=[0.7, np.nan], weight=[2.5, 0.0])
    )
    for _ in range(3):
        _, free, u = step_data(rng, zoned)
        error = np.tile(setpoint, zoned.prediction.penalized_steps) - free
        solution = qp.solve(error=error, free_prediction=free, previous_input=u)
        np.testing.assert_allclose(solution.moves[:M], tracked.gain.horizon @ error, rtol=1e-8, atol=1e-10)


def test_inside_the_zone_the_output_floats_and_the_law_is_the_gain(rng):
    # Predicted inside the zone all along, the zone costs nothing: the QP's answer is the
    # unconstrained optimum of the design with weight 0 on the zone output (Kh E).
    _, design = zone_design(rng)
    zones = make_zones(P, low=[-1e3, np.nan], high=[1e3, np.nan], weight=[5.0, 0.0])
    qp = MoveQP.from_design(design, make_limits(M, P), zones=zones)
    error, free, u = step_data(rng, design)
    solution = qp.solve(error=error, free_prediction=free, previous_input=u)
    assert solution.method == "unconstrained"
    np.testing.assert_allclose(solution.moves[:M], design.gain.horizon @ error, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("warm_start", ["previous", "shifted"])
def test_warm_starts_give_the_cold_answer_with_zones(rng, warm_start):
    _, design = zone_design(rng)
    zones = make_zones(P, low=[-0.3, np.nan], high=[0.3, np.nan], weight=[1.0, 0.0])
    limits = make_limits(M, P, move_max=0.5, output_max=[np.nan, 2.0])
    warm = MoveQP.from_design(design, limits, zones=zones, warm_start=warm_start)
    cold = MoveQP.from_design(design, limits, zones=zones, warm_start="none")
    for _ in range(6):
        error, free, u = step_data(rng, design)
        a = warm.solve(error=error, free_prediction=free, previous_input=u)
        b = cold.solve(error=error, free_prediction=free, previous_input=u)
        np.testing.assert_allclose(a.moves, b.moves, atol=1e-8)


def test_zone_record_counts_the_samples_outside():
    zones = make_zones(2, low=[30.0, np.nan], high=[70.0, np.nan])
    record = zone_record(zones, [[50.0, 0.0], [71.0, 0.0], [29.0, 1.0], [69.0, 2.0]])
    assert record.outputs == (0,)
    assert record.ended_inside == (True,)
    assert record.fraction_inside == (0.5,)
    assert record.largest_excursion == (pytest.approx(1.0),)
    assert record.first_outside == (1,)


# --------------------------------------------------------------------------- marginal modes

# An invented sump: composition x1 (self-regulating, pole 0.8) and level x2 (integrating: the
# inflow u1 raises it, the draw-off u2 lowers it), both measured.
SUMP_A = np.array([[0.8, 0.0], [0.0, 1.0]])
SUMP_B = np.array([[0.5, 0.2], [0.1, -0.1]])
SUMP_C = np.eye(2)


def test_an_integrating_zone_level_is_named_zone_not_unstable_or_unweighted():
    # The level has weight 0 (a zone output): its integrator stays a closed-loop pole at z = 1
    # (the marginal-mode eigenvector argument of service.solver.design.marginal, by hand:
    # W C v = 0 for the level's mode v, so Kx v = 0).
    kwargs = {"output_weight": [1.0, 0.0], "move_weight": [0.1, 0.1], "prediction": 15, "control": 3}
    plain = design_controller(SUMP_A, SUMP_B, SUMP_C, **kwargs)
    zoned = design_controller(SUMP_A, SUMP_B, SUMP_C, **kwargs, zone_outputs=[1])
    # Unzoned, the level's integrator is an unweighted output, and the input direction that
    # ramps the level without moving the composition a free direction; with the zone, both
    # are the zone's.
    assert sorted(m.cause for m in plain.loop.marginal) == ["free_input_direction", "unweighted_output"]
    assert [m.cause for m in zoned.loop.marginal] == ["zone_output", "zone_output"]
    assert all(m.outputs == (1,) and abs(m.pole - 1.0) < 1e-9 for m in zoned.loop.marginal)
    codes = [w.code for w in zoned.warnings]
    assert "zone_output" in codes
    for contradicting in ("unweighted_output", "unstable_closed_loop", "marginal_pole", "free_input_direction"):
        assert contradicting not in codes
    assert not zoned.loop.unstable


def test_free_directions_split_into_zone_and_truly_free():
    # Three inputs, two self-regulating outputs, output 1 in a zone: weighted, only output 0
    # fixes a steady-state direction, so two input directions are free (pole 1 twice).  With
    # the zone output weighted one stays free: that one is a free_input_direction, the other
    # one moves the zone output and is named zone_output (rank count, by hand).
    a = np.diag([0.7, 0.5])
    b = np.array([[1.0, 0.5, 0.2], [0.3, 1.0, 0.4]])
    c = np.eye(2)
    d = design_controller(
        a, b, c, output_weight=[1.0, 0.0], move_weight=[0.1] * 3, prediction=12, control=2, zone_outputs=[1]
    )
    causes = sorted(m.cause for m in d.loop.marginal)
    assert causes == ["free_input_direction", "zone_output"]
    free = next(m for m in d.loop.marginal if m.cause == "free_input_direction")
    gain = c @ np.linalg.solve(np.eye(2) - a, b)  # steady-state gain
    np.testing.assert_allclose(gain @ free.direction, 0.0, atol=1e-8)  # moves neither output
    zone = next(m for m in d.loop.marginal if m.cause == "zone_output")
    assert abs((gain @ zone.direction)[1]) > 1e-3 and abs((gain @ zone.direction)[0]) < 1e-8
