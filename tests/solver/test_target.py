"""The steady-state target: residuals of the target equations and least-squares references.

Sources: the target equations ``[[I - A, -B], [Cz, 0]] [x_s; u_s] = [Bd d; r - Dz d]``
(Muske and Badgwell 2002; Pannocchia and Rawlings 2003); least-norm and weighted
least-squares solutions checked against ``numpy.linalg.lstsq`` and a KKT system solved
with ``numpy.linalg.solve`` (equality-constrained least squares, common practice).
"""

from __future__ import annotations

import numpy as np

from service.solver.estimation.target import steady_state_target, target_problem
from tests.conftest import random_plant


def test_square_target_solves_the_target_equations_exactly(rng):
    n, m, p = 4, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.9)
    for bd, dz in [(np.zeros((n, p)), np.eye(p)), (b, np.zeros((p, m)))]:  # output, input model
        problem = target_problem(a, b, c, disturbance_input=bd, disturbance_output=dz)
        assert problem.every_setpoint_reachable
        r, d = rng.normal(size=p), rng.normal(size=bd.shape[1])
        t = steady_state_target(problem, r, d)
        np.testing.assert_allclose(t.state, a @ t.state + b @ t.input + bd @ d, atol=1e-10)
        np.testing.assert_allclose(c @ t.state + dz @ d, r, atol=1e-10)
        np.testing.assert_allclose(t.output, r, atol=1e-10)
        assert t.reachable
        # the pieces a constrained target builds on give the same residuals
        e_mat, e_rhs = problem.steady_state_equations(d)
        f_mat, f_rhs = problem.output_equations(r, d)
        xu = np.concatenate([t.state, t.input])
        np.testing.assert_allclose(e_mat @ xu, e_rhs, atol=1e-10)
        np.testing.assert_allclose(f_mat @ xu, f_rhs, atol=1e-10)


def test_more_inputs_than_outputs_gives_the_least_norm_exact_target(rng):
    n, m, p = 3, 3, 1
    a, b, c = random_plant(rng, n, m, p, radius=0.8)
    problem = target_problem(a, b, c)
    r = np.array([1.5])
    t = steady_state_target(problem, r)
    # Reference: numpy.linalg.lstsq returns the least-norm solution of the consistent system.
    full = np.block([[np.eye(n) - a, -b], [c, np.zeros((p, m))]])
    ref = np.linalg.lstsq(full, np.concatenate([np.zeros(n), r]), rcond=None)[0]
    np.testing.assert_allclose(np.concatenate([t.state, t.input]), ref, atol=1e-10)
    assert t.reachable and problem.every_setpoint_reachable


def test_fewer_inputs_than_outputs_gives_the_weighted_nearest_steady_state(rng):
    n, m, p = 3, 1, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.8)
    q = np.diag([4.0, 1.0])
    bd, dz = np.zeros((n, p)), np.eye(p)
    problem = target_problem(a, b, c, disturbance_input=bd, disturbance_output=dz, output_weight=q)
    assert not problem.every_setpoint_reachable
    r, d = np.array([1.0, -1.0]), np.array([0.2, 0.1])
    t = steady_state_target(problem, r, d)
    # Reference: KKT system of  min |C x + d - r|^2_Q  s.t.  (I - A) x - B u = Bd d.
    e_mat = np.hstack([np.eye(n) - a, -b])
    f_mat = np.hstack([c, np.zeros((p, m))])
    kkt = np.block([[f_mat.T @ q @ f_mat, e_mat.T], [e_mat, np.zeros((n, n))]])
    rhs = np.concatenate([f_mat.T @ q @ (r - dz @ d), bd @ d])
    ref = np.linalg.solve(kkt, rhs)[: n + m]
    np.testing.assert_allclose(np.concatenate([t.state, t.input]), ref, atol=1e-10)
    assert not t.reachable
    np.testing.assert_allclose(t.offset, t.output - r)
    # the maps give the same outputs: z_s = Z_r r + Z_d d
    np.testing.assert_allclose(
        problem.output_setpoint_map @ r + problem.output_disturbance_map @ d, t.output, atol=1e-12
    )


def test_integrating_plant_target_with_an_input_disturbance():
    # x+ = x + u + d: the steady state needs u_s = -d; z = x so x_s = r (by hand).
    problem = target_problem([[1.0]], [[1.0]], [[1.0]], disturbance_input=[[1.0]], disturbance_output=[[0.0]])
    t = steady_state_target(problem, [2.0], [0.3])
    np.testing.assert_allclose([t.state[0], t.input[0]], [2.0, -0.3], atol=1e-12)
