"""The steady-state target under input limits in any input unit, and where a limit starts to bind.

A change of an input's unit (``u' = f u``: ``B' = B / f``, ``S' = S / f^2``, its limits and input
target times ``f``) is the same physical problem, so the physical target (``x_s``, ``u_s / f``)
must not move (the transformation rule of the change of variables; textbook).  The answers are
checked against the lexicographic target written out by hand in the first units (the KKT system
of an equality-constrained least-squares problem with the limit's active set known, solved by
``numpy.linalg.solve``; its multiplier certifies the active set; textbook), and, where the input
weight leaves ties, the least-norm point of the optimal set by ``numpy.linalg.pinv`` or by its KKT
system in 60-digit arithmetic (``mpmath``; textbook).

Plant (invented): three valves on two first-order lags and a coupled third state, two controlled
outputs, so one valve direction is spare; the input weight S and the input targets place it.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
import scipy.optimize

from service.solver.estimation.target import steady_state_target, target_problem
from service.solver.limits.reachable_target import ReachableTargetProblem

A = np.array([[0.85, 0.05, 0.0], [0.0, 0.7, 0.1], [0.02, 0.0, 0.6]])
B = np.array([[0.4, -0.3, 0.1], [0.2, 0.3, 0.25], [0.0, 0.1, -0.2]])
C = np.array([[1.0, 0.0, 0.5], [0.0, 1.0, 0.0]])
S = np.array([[0.2, 0.05, 0.0], [0.05, 0.3, -0.04], [0.0, -0.04, 0.25]])
R = np.array([1.0, -0.5])
UT = np.array([0.2, 0.0, -0.3])
# Without limits the target puts the third valve at -0.491 (by hand: _kkt with no bound row);
# its lower limit -0.25 binds, the others are far away.
LOW = np.array([-10.0, -10.0, -0.25])
HIGH = np.array([10.0, 10.0, 10.0])


def _kkt(a, b, c, s, r, ut, fixed):
    """``[x_s; u_s]`` and the multipliers of ``min 1/2 |u - u_t|_S^2`` subject to ``(I - A) x = B u``,
    ``C x = r`` and ``u_j = value`` for ``(j, value)`` in ``fixed`` (the KKT system by
    ``numpy.linalg.solve``; textbook)."""
    n, m = b.shape
    rows = [np.hstack([np.eye(n) - a, -b]), np.hstack([c, np.zeros((c.shape[0], m))])]
    rhs = [np.zeros(n), r]
    for j, value in fixed:
        rows.append(np.eye(n + m)[n + j][None, :])
        rhs.append(np.array([value]))
    e, g = np.vstack(rows), np.concatenate(rhs)
    h = np.zeros((n + m, n + m))
    h[n:, n:] = s
    kkt = np.block([[h, e.T], [e, np.zeros((e.shape[0], e.shape[0]))]])
    sol = np.linalg.solve(kkt, np.concatenate([np.concatenate([np.zeros(n), s @ ut]), g]))
    return sol[: n + m], sol[n + m :]


def _scaled(f, k):
    """The problem with input ``k`` in units ``f`` times smaller: ``(d, B', S', low', high', u_t')``."""
    d = np.ones(3)
    d[k] = f
    return d, B / d[None, :], S / np.outer(d, d), LOW * d, HIGH * d, UT * d


def test_the_hand_reference_is_the_limited_target():
    # The reference itself: without the bound the third valve would sit below its limit, and
    # with it held on the limit the bound's multiplier has the sign of a lower bound that
    # pushes (mu <= 0 for the stationarity S (u - u_t) + E' lambda = 0 written with +mu e_j).
    free, _ = _kkt(A, B, C, S, R, UT, [])
    assert free[5] < LOW[2] and np.all(free[3:5] > LOW[:2]) and np.all(free[3:] < HIGH)
    held, multipliers = _kkt(A, B, C, S, R, UT, [(2, LOW[2])])
    assert multipliers[-1] < 0.0
    assert np.all(held[3:] >= LOW - 1e-12) and np.all(held[3:] <= HIGH)


@pytest.mark.parametrize("scale", [1.0, 1e6, 1e9, 1e-9])
@pytest.mark.parametrize("which", [0, 1, 2])
def test_the_limited_target_is_the_same_in_any_input_unit(scale, which):
    # Found in a review: in the request's units an input in units 1e6 or 1e9 times smaller (or
    # larger) made the target's QPs stop at their iteration limit, report infeasible, or put
    # the valves up to 8.9 (in the first units) off the target.  Reference: _kkt in the first
    # units with the third valve on its lower limit (the test above certifies that active set).
    d, b, s, low, high, ut = _scaled(scale, which)
    problem = target_problem(A, b, C, output_weight=[1.0, 2.0], input_weight=s)
    target = ReachableTargetProblem(problem, input_min=low, input_max=high).solve(R, None, ut)
    want, _ = _kkt(A, B, C, S, R, UT, [(2, LOW[2])])
    assert target.solved and target.status == "optimal" and target.reachable
    np.testing.assert_allclose(target.state, want[:3], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(target.input / d, want[3:], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(target.output, R, rtol=0, atol=1e-9)
    assert target.input_at_min.tolist() == [False, False, True] and not target.input_at_max.any()


# One controlled output, four valves and an input weight on the first valve only: after the
# output and the first valve are placed two directions are left, one of them taken by the limit
# on the third valve, the other by the least norm (in the moderate input units of the target's
# notes, service.solver.estimation.target; here T = (2, 2, 4, 4), so not the request's units).
B1 = np.hstack([B, [[0.05], [-0.1], [0.3]]])
C1 = np.array([[1.0, 0.0, 0.5]])
S1 = np.diag([0.2, 0.0, 0.0, 0.0])
R1 = np.array([1.0])
UT1 = np.array([0.5, 0.0, 0.0, 0.0])


def _least_norm_reference(bound):
    """The lexicographic target with the third valve held at ``bound`` (an active lower limit):
    the first valve on its target (the equalities allow it exactly), then the least norm of
    ``[x_s; u_s / T]`` on what is left, ``T`` the powers of two nearest ``1 / |column of [B;
    S^(1/2)]|`` (the rule of the target's notes), by ``numpy.linalg.pinv`` (textbook)."""
    n, m = B1.shape
    t = np.exp2(-np.round(np.log2(np.sqrt((B1**2).sum(axis=0) + np.diag(S1)))))
    assert t.tolist() == [2.0, 2.0, 4.0, 4.0]
    e = np.vstack(
        [np.hstack([np.eye(n) - A, -B1]), np.hstack([C1, np.zeros((1, m))]), np.eye(n + m)[[n, n + 2]]]
    )  # steady state, output on R1, u_1 = u_t1 (S1's level, met exactly), u_3 on the bound
    g = np.concatenate([np.zeros(n), R1, [UT1[0], bound]])
    scale = np.concatenate([np.ones(n), t])  # [x; u] = diag(1, T) [x; v]
    return scale * (np.linalg.pinv(e * scale[None, :]) @ g)


@pytest.mark.parametrize("gap", [1e-3, 1e-6, 1e-9])
def test_the_target_moves_little_when_a_limit_starts_to_bind(gap):
    # A limit closing in by a relative gap on the third valve's unconstrained target must move
    # the target by about that much: the QP's tie-break must be the unconstrained maps' own.
    # Found in a review: the QP broke the tie in the request's units, the maps in the moderate
    # units, and the target jumped as soon as the limit became active.  References: the
    # unconstrained target (its own tests check it against the hand KKT target) and the
    # least-norm point of the optimal set (_least_norm_reference).
    problem = target_problem(A, B1, C1, input_weight=S1)
    free = steady_state_target(problem, R1, None, UT1)
    assert free.input[2] < 0.0
    bound = free.input[2] * (1.0 - gap)
    low = np.array([-10.0, -10.0, bound, -10.0])
    target = ReachableTargetProblem(problem, input_min=low, input_max=np.full(4, 10.0)).solve(R1, None, UT1)
    assert target.status == "optimal" and target.reachable and target.input_at_min[2]
    want = _least_norm_reference(bound)
    np.testing.assert_allclose(np.concatenate([target.state, target.input]), want, rtol=0, atol=1e-9)
    # Moves of the size of the gap (the bound moved by |u_3| gap; a bounded sensitivity).
    size = abs(free.input[2]) * gap
    assert np.abs(target.input - free.input).max() <= 10.0 * size
    assert np.abs(target.state - free.state).max() <= 10.0 * size
    # The reference with the bound on the unconstrained target's own value is that target: both
    # sides of the switch solve the same lexicographic problem.
    np.testing.assert_allclose(_least_norm_reference(free.input[2])[3:], free.input, rtol=0, atol=1e-9)


@pytest.mark.parametrize("scale", [2.0**20, 2.0**-30])
def test_the_tie_break_does_not_depend_on_an_input_unit_of_a_power_of_two(scale):
    # With ties left by S the least norm is taken in the moderate units; those absorb a power of
    # two exactly, so the limited target must come back the same (transformation rule).
    low, high = np.array([-10.0, -10.0, -0.1, -10.0]), np.full(4, 10.0)
    first = ReachableTargetProblem(target_problem(A, B1, C1, input_weight=S1), input_min=low, input_max=high)
    base = first.solve(R1, None, UT1)
    np.testing.assert_allclose(np.concatenate([base.state, base.input]), _least_norm_reference(-0.1), atol=1e-9)
    d = np.array([1.0, scale, 1.0, 1.0])
    problem = target_problem(A, B1 / d[None, :], C1, input_weight=S1 / np.outer(d, d))
    other = ReachableTargetProblem(problem, input_min=low * d, input_max=high * d).solve(R1, None, UT1 * d)
    assert base.status == other.status == "optimal"
    np.testing.assert_allclose(other.state, base.state, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(other.input / d, base.input, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("scale", [1e6, 1e9, 1e-9])
@pytest.mark.parametrize("which", [0, 1, 2])
def test_without_an_input_weight_a_square_plant_s_limited_target_is_the_same_in_any_input_unit(scale, which):
    # Three valves, three outputs, no input weight: the limited target is unique.  Found beside
    # the above: in the request's units an input in units 1e6 times smaller stopped the fit at
    # its iteration limit (the target fell back to the clipped one, 0.31 off).  Reference: the
    # bounded least squares on the steady-state gain K = C (I - A)^-1 B in the first units
    # (scipy.optimize.lsq_linear, method "bvls").
    c3 = np.vstack([C, [0.0, 0.0, 1.0]])
    r = np.array([1.0, -0.5, 0.3])
    low, high = np.array([-10.0, -10.0, -10.0]), np.array([0.17, 10.0, 10.0])
    k = c3 @ np.linalg.solve(np.eye(3) - A, B)
    want = scipy.optimize.lsq_linear(k, r, bounds=(low, high), method="bvls", tol=1e-14).x
    assert abs(want[0] - high[0]) < 1e-12  # the first valve's limit binds
    d = np.ones(3)
    d[which] = scale
    problem = target_problem(A, B / d[None, :], c3)
    target = ReachableTargetProblem(problem, input_min=low * d, input_max=high * d).solve(r)
    assert target.solved and target.status == "optimal" and not target.reachable
    np.testing.assert_allclose(target.input / d, want, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(target.state, np.linalg.solve(np.eye(3) - A, B @ want), rtol=1e-9, atol=1e-12)
    assert target.input_at_max.tolist() == [True, False, False]


@pytest.mark.parametrize("scale", [1e6, 1e9, 1e12])
@pytest.mark.parametrize("weighted", [True, False])
def test_the_limited_target_is_the_same_with_the_states_and_outputs_in_tiny_units(scale, weighted):
    # States and outputs in units `scale` times smaller (x' = f x, z' = f z: B' = f B, C' = C,
    # Q' = Q / f^2, r' = f r; the same problem).  Found in a review: the target QPs were posed with
    # Hessians of size 1/f^2 and answers of size f against the solver's absolute tolerances, and
    # came back "optimal" with the outputs at (1.12, -0.84) for the reachable setpoint (1, -0.5)
    # and the valves 0.26 off.
    # References: _kkt in the first units (with S), the bounded least squares on the steady-state
    # gain (scipy.optimize.lsq_linear, "bvls"; without S, three outputs for a unique target).
    c = C if weighted else np.vstack([C, [0.0, 0.0, 1.0]])
    r = R if weighted else np.array([1.0, -0.5, 0.3])
    q = np.ones(c.shape[0])
    low, high = (LOW, HIGH) if weighted else (np.array([-10.0, -10.0, -10.0]), np.array([0.17, 10.0, 10.0]))
    if weighted:
        want, _ = _kkt(A, B, C, S, R, UT, [(2, LOW[2])])
    else:
        k = c @ np.linalg.solve(np.eye(3) - A, B)
        u = scipy.optimize.lsq_linear(k, r, bounds=(low, high), method="bvls", tol=1e-14).x
        want = np.concatenate([np.linalg.solve(np.eye(3) - A, B @ u), u])
    problem = target_problem(A, scale * B, c, output_weight=q / scale**2, input_weight=S if weighted else None)
    solver = ReachableTargetProblem(problem, input_min=low, input_max=high)
    target = solver.solve(scale * r, None, UT if weighted else None)
    assert target.solved and target.status == "optimal"
    np.testing.assert_allclose(target.state / scale, want[:3], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(target.input, want[3:], rtol=1e-9, atol=1e-12)


BD = np.array([[0.0, 0.3], [0.1, 0.0], [0.0, -0.2]])  # a feed disturbance on the states
DZ = np.array([[1.0, 0.0], [0.0, 0.0]])  # and a bias on the first output
DIST = np.array([0.4, -0.7])


def _least_norm_mp(e, g):
    """The least-norm solution of ``e xi = g`` (full row rank) by its KKT system ``[I e'; e 0]``
    in 60-digit arithmetic (mpmath.lu_solve; textbook), rounded to floats."""
    mpmath.mp.dps = 60
    rows, cols = e.shape
    kkt = mpmath.matrix(cols + rows, cols + rows)
    for i in range(cols):
        kkt[i, i] = 1
    for i in range(rows):
        for j in range(cols):
            kkt[cols + i, j] = kkt[j, cols + i] = mpmath.mpf(float(e[i, j]))
    sol = mpmath.lu_solve(kkt, mpmath.matrix([0] * cols + [mpmath.mpf(float(x)) for x in g]))
    return np.array([float(sol[i]) for i in range(cols)])


@pytest.mark.parametrize("scale", [1.0, 1e6, 1e9])
def test_with_a_disturbance_and_no_input_weight_the_tie_is_the_least_norm_in_the_request_s_units(scale):
    # Four valves, two outputs, no input weight, a disturbance estimate: with the third valve on
    # its limit one direction is left, which the least norm |[x_s; u_s]| decides in the request's
    # units (the unconstrained target's own tie-break).  Reference: the least-norm solution of
    # the equalities with the active set known, in those units (_least_norm_mp).  (The second
    # valve in units 1e9 times larger instead gives it a weight of 1e-18 in that norm: a tie
    # break of condition 1e9, which a solve in those units meets to about 1e-8 only.)
    n, m = B1.shape
    d = np.array([1.0, scale, 1.0, 1.0])
    b = B1 / d[None, :]
    problem = target_problem(A, b, C, disturbance_input=BD, disturbance_output=DZ)
    free = steady_state_target(problem, R, DIST)
    bound = 0.5 * free.input[2]
    low, high = np.full(m, -10.0) * d, np.full(m, 10.0) * d
    if bound > 0.0:
        high[2] = bound
    else:
        low[2] = bound
    target = ReachableTargetProblem(problem, input_min=low, input_max=high).solve(R, DIST)
    e = np.vstack([np.hstack([np.eye(n) - A, -b]), np.hstack([C, np.zeros((2, m))]), np.eye(n + m)[[n + 2]]])
    want = _least_norm_mp(e, np.concatenate([BD @ DIST, R - DZ @ DIST, [bound]]))
    others = [0, 1, 3]
    assert np.all(want[n:][others] > low[others]) and np.all(want[n:][others] < high[others])  # only u_3 held
    assert target.status == "optimal" and target.reachable
    np.testing.assert_allclose(target.state, want[:n], rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(target.input / d, want[n:] / d, rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("scale", [1e6, 1e9, 1e-9])
@pytest.mark.parametrize("which", [0, 1, 2])
def test_with_a_disturbance_the_limited_target_is_the_same_in_any_input_unit(scale, which):
    # As above with the disturbance estimate: the base P0 d of the steady states is taken in the
    # moderate units too.  Reference: _kkt's system with the disturbance on its right-hand side.
    dd, b, s, low, high, ut = _scaled(scale, which)
    problem = target_problem(A, b, C, disturbance_input=BD, disturbance_output=DZ, input_weight=s)
    target = ReachableTargetProblem(problem, input_min=low, input_max=high).solve(R, DIST, ut)
    n, m = B.shape
    e = np.vstack([np.hstack([np.eye(n) - A, -B]), np.hstack([C, np.zeros((2, m))]), np.eye(n + m)[[n + 2]]])
    h = np.zeros((n + m, n + m))
    h[n:, n:] = S
    kkt = np.block([[h, e.T], [e, np.zeros((e.shape[0], e.shape[0]))]])
    rhs = np.concatenate([np.zeros(n), S @ UT, BD @ DIST, R - DZ @ DIST, [LOW[2]]])
    sol = np.linalg.solve(kkt, rhs)
    assert sol[-1] < 0.0  # the lower limit pushes (as in test_the_hand_reference_is_the_limited_target)
    assert target.status == "optimal" and target.reachable and target.input_at_min[2]
    np.testing.assert_allclose(target.state, sol[:n], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(target.input / dd, sol[n : n + m], rtol=1e-9, atol=1e-12)


def _state_scaled(f, j):
    """The same plant with state ``j`` in units ``f`` times smaller (``x' = D x``, ``D = diag(..f..)``):
    ``(D, A', B', C')`` with ``A' = D A D^-1``, ``B' = D B``, ``C' = C D^-1`` (change of state
    coordinates; textbook)."""
    d = np.ones(3)
    d[j] = f
    return d, A * d[:, None] / d[None, :], B * d[:, None], C / d[None, :]


@pytest.mark.parametrize("f", [1e-9, 1e6, 1e9, 1e12])
@pytest.mark.parametrize("j", [0, 1, 2])
def test_a_state_in_other_units_changes_neither_target_nor_verdict(f, j):
    # States are the model's own business: a realization in other state units is the same plant,
    # so (x_s / D, u_s) and the reachable verdict must not move.  Reference: the hand KKT target
    # in the first units.  On the request's states the maps had lost 1e-9 of the target with a
    # state 1e9 apart (the setpoint then called out of reach), 4e-6 with 1e12.
    want, _ = _kkt(A, B, C, S, R, UT, [])
    d, a, b, c = _state_scaled(f, j)
    free = steady_state_target(target_problem(a, b, c, input_weight=S), R, None, UT)
    assert free.reachable
    np.testing.assert_allclose(free.state / d, want[:3], rtol=0, atol=1e-12)
    np.testing.assert_allclose(free.input, want[3:], rtol=0, atol=1e-12)
    # under the binding limit: the third valve held at -0.25, the target by hand
    held, mult = _kkt(A, B, C, S, R, UT, [(2, LOW[2])])
    assert mult[-1] < 0  # a lower bound that pushes up (the sign convention of _kkt): the active set is right
    limited = ReachableTargetProblem(target_problem(a, b, c, input_weight=S), input_min=LOW, input_max=HIGH)
    got = limited.solve(R, None, UT)
    assert got.status == "optimal" and got.reachable
    np.testing.assert_allclose(got.state / d, held[:3], rtol=0, atol=1e-10)
    np.testing.assert_allclose(got.input, held[3:], rtol=0, atol=1e-10)


@pytest.mark.parametrize("f", [1e-9, 1e9])
def test_a_state_in_other_units_without_an_input_weight_keeps_the_square_target(f):
    # Two of the valves for two outputs (no ties, no input weight): the target is unique, so it
    # must be the same in any state units.  Reference: scipy.optimize.lsq_linear (bvls) on the
    # steady-state gain C (I - A)^-1 B under the limits, in the first units.
    sq = B[:, :2]
    gain = C @ np.linalg.solve(np.eye(3) - A, sq)
    low, high = np.array([-0.3, -0.3]), np.array([0.3, 0.3])
    far = 3.0 * R
    ref = scipy.optimize.lsq_linear(gain, far, bounds=(low, high), method="bvls", tol=1e-14)
    d, a, b, c = _state_scaled(f, 1)
    got = ReachableTargetProblem(target_problem(a, b[:, :2], c), input_min=low, input_max=high).solve(far)
    np.testing.assert_allclose(got.input, ref.x, atol=1e-9)
    np.testing.assert_allclose(got.output, gain @ ref.x, atol=1e-9)
    assert not got.reachable
