"""The faster routes to the design's diagnostics give the answers of the plain routes.

Each fast route (Lanczos eigenvalues with the Cholesky factor, the "what if" condition numbers
updated from the design's Hessian, transmission zeros from the reduced matrix, the inverse
response of several zeros at once, the steady-state gain without the Schur form) is checked
against the plain route it replaces, computed here with scipy directly.
"""

from __future__ import annotations

import control
import numpy as np
import pytest
import scipy.linalg

from service.solver.design.controller import design_controller
from service.solver.design.gain import mirror_upper, weighted_moves
from service.solver.design.prediction import prediction_matrices, step_response_coefficients
from service.solver.design.spectrum import spectrum_ends
from service.solver.evaluation.advice import (
    _condition_number,
    _inverse_response_times,
    transmission_zeros,
)
from service.solver.models.properties import integrating_poles, open_loop_poles, steady_state_gain
from service.solver.models.sampling import sample_zero_order_hold
from service.solver.numerics import balance_states, jacobi_scaled
from tests.conftest import random_plant

EPS = np.finfo(float).eps


def _large_design(rng: np.random.Generator, *, move: float = 0.1, control: int = 60):
    # A random stable 40-state plant with 8 inputs and outputs: a 480 x 480 Hessian, above
    # the dense threshold (invented numbers, like the large benchmark case).
    a, b, c = random_plant(rng, 40, 8, 8, radius=0.95)
    return (
        a,
        b,
        c,
        design_controller(
            a, b, c, output_weight=np.ones(8), move_weight=np.full(8, move), prediction=80, control=control
        ),
    )


def _known_spectrum(rng: np.random.Generator, *, separated: bool, size: int = 450):
    """A symmetric matrix ``Q diag(values) Q'`` (random orthogonal ``Q``), and its values.

    The values run geometrically from 2 to 1e3 (relative gaps of about 1 %); ``separated``
    moves the two ends apart from the rest, to 1 and 3e3, as in a design Hessian.
    """
    q, _ = np.linalg.qr(rng.normal(size=(size, size)))
    values = np.geomspace(2.0, 1e3, size)
    if separated:
        values[0], values[-1] = 1.0, 3e3
    h = (q * values) @ q.T
    return 0.5 * (h + h.T), values


@pytest.mark.parametrize("separated", [True, False])
def test_lanczos_ends_of_a_known_spectrum_equal_dense_eigvalsh(rng, separated):
    # Reference: the eigenvalues the matrix was built from, and scipy.linalg.eigvalsh.  With
    # both ends apart from the rest (as in a design Hessian) Lanczos answers; with a
    # geometric spectrum (relative gaps of 1 %) it does not converge within its restarts and
    # the dense route answers; the numbers agree either way.
    h, values = _known_spectrum(rng, separated=separated)
    ends = spectrum_ends(h, factor=scipy.linalg.cho_factor(h, lower=True))
    assert ends.method == ("lanczos" if separated else "dense")
    dense = scipy.linalg.eigvalsh(h)
    assert ends.low == pytest.approx(dense[0], rel=1e-10)
    assert ends.high == pytest.approx(dense[-1], rel=1e-10)
    assert (ends.low, ends.high) == pytest.approx((values[0], values[-1]), rel=1e-10)


def test_lanczos_ends_of_a_design_hessian_equal_dense_eigvalsh(rng):
    # Reference: scipy.linalg.eigvalsh of the same Hessian.  l_max to 1e-10 relative; l_min
    # to 1e-10 relative or, when the Hessian is ill-conditioned, to the dense solver's own
    # error bound k eps l_max (LAPACK Users' Guide, 3rd ed., section 4.7).
    *_, d = _large_design(rng)
    h = d.hessian.matrix
    assert d.hessian.eigenvalue_method == "lanczos"
    dense = scipy.linalg.eigvalsh(h)
    assert d.hessian.largest_eigenvalue == pytest.approx(dense[-1], rel=1e-10)
    bound = max(1e-10 * dense[0], h.shape[0] * EPS * dense[-1])
    assert abs(d.hessian.smallest_eigenvalue - dense[0]) <= bound


def test_lanczos_ends_are_the_same_on_every_call(rng):
    # The start vector is fixed: the same request always gives the same numbers.
    *_, d = _large_design(rng)
    again = spectrum_ends(d.hessian.matrix, factor=d.hessian.factor)
    assert (again.low, again.high) == (d.hessian.smallest_eigenvalue, d.hessian.largest_eigenvalue)


@pytest.mark.parametrize("separated", [True, False])
def test_scaled_ends_equal_dense_eigvalsh_of_the_scaled_matrix(rng, separated):
    # Reference: scipy.linalg.eigvalsh of D^-1/2 H D^-1/2 formed explicitly.  The inputs are in
    # badly scaled units (diagonal from 1e-4 to 1e4), which the scaling removes; the Lanczos
    # route applies the scaling inside its products and uses the factor of H itself, and a
    # spectrum without separated ends falls back to the dense route on the scaled matrix.
    unit, _ = _known_spectrum(rng, separated=separated)
    size = unit.shape[0]
    units = np.geomspace(1e-2, 1e2, size)
    rng.shuffle(units)
    h = unit * units[:, None] * units[None, :]
    h = 0.5 * (h + h.T)
    ends = spectrum_ends(h, factor=scipy.linalg.cho_factor(h, lower=True), scaled=True)
    root = np.sqrt(np.diag(h))
    dense = scipy.linalg.eigvalsh(h / root[:, None] / root[None, :])
    assert ends.method == ("lanczos" if separated else "dense")
    assert ends.low == pytest.approx(dense[0], rel=1e-10)
    assert ends.high == pytest.approx(dense[-1], rel=1e-10)
    small = h[:40, :40]
    below = spectrum_ends(small, factor=scipy.linalg.cho_factor(small, lower=True), scaled=True)
    reference = scipy.linalg.eigvalsh(jacobi_scaled(small))
    assert below.method == "dense"
    assert (below.low, below.high) == (reference[0], reference[-1])


@pytest.mark.parametrize("layout", ["c_order", "fortran_order", "leading_block_view"])
@pytest.mark.parametrize("lower", [True, False])
@pytest.mark.parametrize("scaled", [False, True])
def test_lanczos_ends_in_every_memory_layout_equal_dense_eigvalsh(rng, layout, lower, scaled):
    # Reference: scipy.linalg.eigvalsh (of D^-1/2 H D^-1/2 formed explicitly when scaled).
    # The Lanczos products call BLAS (dsymv, dtrsv) on Fortran-ordered arrays; a C-ordered
    # matrix, a strided leading block (the "what if" of a shorter control horizon), an upper
    # factor and a C-ordered factor must all give the same ends.
    full, _ = _known_spectrum(rng, separated=True, size=520)
    if layout == "leading_block_view":
        h = full[:450, :450]  # not contiguous
    elif layout == "fortran_order":
        h = np.asfortranarray(full[:450, :450])
    else:
        h = np.ascontiguousarray(full[:450, :450])
    triangle, flag = scipy.linalg.cho_factor(h, lower=lower)
    factor = (np.ascontiguousarray(triangle) if layout == "c_order" else triangle, flag)
    ends = spectrum_ends(h, factor=factor, scaled=scaled)
    reference = scipy.linalg.eigvalsh(jacobi_scaled(np.array(h)) if scaled else np.array(h))
    assert ends.method == "lanczos"
    assert ends.low == pytest.approx(reference[0], rel=1e-10)
    assert ends.high == pytest.approx(reference[-1], rel=1e-10)


@pytest.mark.parametrize("size, block", [(7, 3), (60, 4), (61, 1)])
def test_mirror_upper_gives_the_numbers_of_triu_plus_its_transpose(rng, size, block):
    # Reference: numpy's np.triu(h) + np.triu(h, 1).T, which mirror_upper replaces; the lower
    # triangle it is given holds garbage (as the Toeplitz recurrence leaves it), never read.
    upper = rng.normal(size=(size, size))
    garbage = np.where(np.tri(size, k=-1, dtype=bool), np.nan, upper)
    mirrored = mirror_upper(garbage.copy(), block)
    np.testing.assert_array_equal(mirrored, np.triu(upper) + np.triu(upper, 1).T)


@pytest.mark.parametrize("first_penalized", [1, 4])
def test_prediction_and_weighted_moves_equal_the_definition(rng, first_penalized):
    # Reference: the definition G_ij = S_(i-j) (zero for i - j <= 0), with S_k summed here
    # from C A^l B by numpy; Wbar G as the product with blockdiag(W, ..., W) (scipy's
    # block_diag), for a diagonal and a full W.  The Toeplitz windows copy exactly.
    a, b, c = random_plant(rng, 6, 3, 2, radius=0.9)
    hp, hu, hw = 12, 5, first_penalized
    pred = prediction_matrices(a, b, c, prediction=hp, control=hu, first_penalized=hw)
    markov = [c @ np.linalg.matrix_power(a, k) @ b for k in range(hp)]
    step = [np.zeros((2, 3))] + [sum(markov[:k]) for k in range(1, hp + 1)]
    g = np.block([[step[i - j] if i - j > 0 else np.zeros((2, 3)) for j in range(hu)] for i in range(hw, hp + 1)])
    np.testing.assert_allclose(pred.moves, g, rtol=1e-12, atol=1e-14)
    for root in (np.diag([1.5, 0.5]), np.array([[1.0, 0.3], [0.0, 2.0]])):
        wbar = scipy.linalg.block_diag(*([root] * (hp - hw + 1)))
        np.testing.assert_allclose(weighted_moves(pred, root), wbar @ pred.moves, rtol=1e-12, atol=1e-14)


def test_a_clustered_end_falls_back_to_the_dense_solver(rng):
    # Slow first-order lags with a control horizon as long as the plant's settling put
    # hundreds of eigenvalues within 1e-6 of the move weight: Lanczos cannot resolve them
    # within its restarts, and the dense answer (scipy.linalg.eigvalsh) is returned exactly.
    n = 5
    a = np.diag(np.exp(-1.0 / np.linspace(20.0, 80.0, n)))
    b = np.eye(n) * (1.0 - np.diag(a))
    c = rng.normal(size=(n, n))
    d = design_controller(a, b, c, output_weight=np.ones(n), move_weight=np.full(n, 0.01), prediction=150, control=100)
    dense = scipy.linalg.eigvalsh(d.hessian.matrix)
    assert d.hessian.eigenvalue_method == "dense"
    assert (d.hessian.smallest_eigenvalue, d.hessian.largest_eigenvalue) == (dense[0], dense[-1])


@pytest.mark.parametrize("move", [[0.1] * 8, [0.1, 0.2, 0.3, 0.4, 0.1, 0.2, 0.3, 0.4]])
def test_updated_what_if_condition_numbers_equal_full_redesigns(rng, move):
    # Reference: design_controller run again with the heavier weights and the shorter horizon,
    # its Hessian scaled to unit diagonal (the verdicts are unit-free) and its condition number
    # from scipy's dense symmetric eigensolver.  The update reuses the leading block of the
    # design's Cholesky factor for the shorter horizon and factors once more for heavier moves.
    a, b, c = random_plant(rng, 40, 8, 8, radius=0.95)
    base = {"output_weight": np.ones(8), "prediction": 80}
    d = design_controller(a, b, c, move_weight=np.array(move), control=60, **base)
    heavier = design_controller(a, b, c, move_weight=10.0 * np.array(move), control=60, **base)
    shorter = design_controller(a, b, c, move_weight=np.array(move), control=30, **base)

    def dense_condition(h):
        root = np.sqrt(np.diag(h))
        values = scipy.linalg.eigvalsh(h / root[:, None] / root[None, :])
        return values[-1] / values[0]

    assert _condition_number(a, b, c, d, move_scale=10.0, control=60) == pytest.approx(
        dense_condition(heavier.hessian.matrix), rel=1e-9
    )
    assert _condition_number(a, b, c, d, move_scale=1.0, control=30) == pytest.approx(
        dense_condition(shorter.hessian.matrix), rel=1e-9
    )


def test_reduced_zeros_equal_the_rosenbrock_pencil(rng):
    # Reference: the finite generalized eigenvalues of the Rosenbrock pencil by QZ
    # (scipy.linalg.eig), the route the reduction replaces when CB is well conditioned.
    a, b, c = random_plant(rng, 30, 4, 4, radius=0.95)
    n, m = b.shape
    system = np.block([[a, b], [c, np.zeros((m, m))]])
    mass = scipy.linalg.block_diag(np.eye(n), np.zeros((m, m)))
    alpha, beta = scipy.linalg.eig(system, mass, right=False, homogeneous_eigvals=True)
    finite = np.abs(beta) > 1e-8 * np.abs(alpha)
    reference = alpha[finite] / beta[finite]
    ours = transmission_zeros(a, b, c)
    assert ours.size == n - m == reference.size
    distance = np.abs(ours[:, None] - reference[None, :])
    assert np.all(distance.min(axis=0) <= 1e-8 * np.maximum(1.0, np.abs(reference)))
    assert np.all(distance.min(axis=1) <= 1e-8 * np.maximum(1.0, np.abs(ours)))


def test_zeros_of_a_plant_with_dead_time_take_the_pencil():
    # CB = 0 (one sample of dead time in front of 1/(z - 0.5)): the reduction does not apply,
    # and the pencil finds no finite zero; the transfer function 1/(z (z - 0.5)) has none
    # (textbook: the numerator is 1).
    a = np.array([[0.5, 1.0], [0.0, 0.0]])
    b = np.array([[0.0], [1.0]])
    c = np.array([[1.0, 0.0]])
    assert transmission_zeros(a, b, c).size == 0


def test_inverse_response_of_several_zeros_at_once_equals_each_alone(rng):
    # Reference: the step response S_k from step_response_coefficients read along each
    # zero's null directions from a full SVD of the system matrix, one zero at a time
    # (the plain route of the module notes).
    a, b, c = random_plant(rng, 20, 3, 3, radius=0.9)
    zeros = [z for z in transmission_zeros(a, b, c) if abs(z) > 1.0 + 1e-9]
    real = [z for z in zeros if abs(z.imag) <= 1e-9 * abs(z) and z.real > 0]
    assert real, "the seeded plant has a real zero outside the unit circle"
    together = _inverse_response_times(a, b, c, zeros)
    poles = np.abs(scipy.linalg.eigvals(a))
    slowest = float((-1.0 / np.log(poles[(poles > 0) & (poles < 1)])).max(initial=1.0))
    steps = int(min(5000, max(50, np.ceil(10.0 * slowest))))
    _, step = step_response_coefficients(a, b, c, steps)
    n, m = b.shape
    for z, time in zip(zeros, together, strict=True):
        fallback = max(1, int(np.ceil(1.0 / np.log(abs(z)))))
        if z not in real:
            assert time == fallback
            continue
        system = np.block([[a - z.real * np.eye(n), b], [c, np.zeros((m, m))]])
        left, _, right = np.linalg.svd(system)
        channel = np.einsum("i,kij,j->k", left[n:, -1], step[1:], right[-1, n:])
        final, size = channel[-1], np.abs(channel).max()
        wrong = np.nonzero((channel * np.sign(final) < 0) & (np.abs(channel) > 1e-12 * size))[0]
        assert time == (int(wrong[-1]) + 2 if wrong.size else fallback)


def test_steady_state_gain_with_known_poles_equals_the_schur_route(rng):
    # Reference: C (I - A)^-1 B by numpy.linalg.solve (final value theorem), and the same
    # function without the poles (the sorted Schur route).
    a, b, c = random_plant(rng, 12, 3, 2, radius=0.9)
    fast = steady_state_gain(a, b, c, poles=open_loop_poles(a))
    plain = steady_state_gain(a, b, c)
    np.testing.assert_array_equal(fast.gain, plain.gain)
    np.testing.assert_allclose(fast.gain, c @ np.linalg.solve(np.eye(12) - a, b), rtol=1e-12)


def test_steady_state_gain_of_an_integrating_plant_still_takes_the_schur_route():
    # A level (pole at 1) beside a first-order lag: order 1 with ramp rate 1 and the finite
    # gain 1 / (1 - 0.5) = 2 (final value theorem), whether or not the poles are passed.
    a = np.diag([1.0, 0.5])
    b = np.eye(2)
    c = np.eye(2)
    fast = steady_state_gain(a, b, c, poles=open_loop_poles(a))
    assert fast.integration_order.tolist() == [[1, 0], [0, 0]]
    assert fast.ramp_rate[0, 0] == pytest.approx(1.0)
    assert fast.gain[1, 1] == pytest.approx(2.0)


@pytest.mark.parametrize("sample_time", [1e-3, 1.0, 100.0])
def test_integrating_poles_with_known_poles_counts_the_same(sample_time):
    # A level, a double integrator and a lag of 10^5 s sampled exactly (scipy's expm through
    # the service), and the same plant with every pole pulled inside: the count with the
    # poles passed equals the count the function makes on its own, and python-control's poles
    # (a general-purpose reference) put the integrators at 1.
    a = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, -1e-5]])
    b = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [0.0, 1e-5]])
    ad = sample_zero_order_hold(a, b, sample_time=sample_time).a
    assert integrating_poles(ad, poles=open_loop_poles(ad)) == integrating_poles(ad) == 3
    assert sum(abs(z - 1) < 1e-6 for z in control.ss(ad, np.zeros((4, 1)), np.eye(4), 0, sample_time).poles()) >= 3
    inside = 0.5 * ad
    assert integrating_poles(inside, poles=open_loop_poles(inside)) == integrating_poles(inside) == 0


def test_the_estimators_integrator_test_reuses_the_plants_poles(rng, monkeypatch):
    # One eigenvalue problem of A per plant: the integrator test of the estimator reads the
    # open-loop poles the plant's properties computed (service.solver.memo.plant_cache).
    from service.solver.estimation import estimator
    from service.solver.memo import clear_plant_caches
    from service.solver.models import properties

    a, b, c = random_plant(rng, 12, 3, 2, radius=0.9)
    clear_plant_caches()
    calls = []
    real = properties.scipy.linalg.eigvals

    def counted(matrix, *args, **kwargs):
        calls.append(np.shape(matrix))
        return real(matrix, *args, **kwargs)

    monkeypatch.setattr(properties.scipy.linalg, "eigvals", counted)
    properties.plant_properties(a, b, c)
    estimator.integrating_outputs(a, c)
    assert calls == [(12, 12)]
    clear_plant_caches()


def _balance_by_definition(a, b, c, *, sweeps=30):
    # Parlett and Reinsch's balancing ("Balancing a matrix for calculation of eigenvalues and
    # eigenvectors", Numer. Math. 13, 1969) of [[A, B], [C, 0]] with state rows and columns
    # tied, written out entry by entry: state i's scale is the power of two nearest
    # sqrt(row / col), each state in turn, until a sweep changes nothing.
    n = a.shape[0]
    d = [1.0] * n
    for _ in range(sweeps):
        changed = False
        for i in range(n):
            col = max(
                [abs(a[j, i]) / d[j] * d[i] for j in range(n) if j != i] + [abs(v) * d[i] for v in c[:, i]] + [0.0]
            )
            row = max(
                [abs(a[i, j]) * d[j] / d[i] for j in range(n) if j != i] + [abs(v) / d[i] for v in b[i, :]] + [0.0]
            )
            if col == 0.0 or row == 0.0:
                continue
            f = float(np.exp2(np.round(0.5 * np.log2(row / col))))
            if f != 1.0:
                d[i] *= f
                changed = True
        if not changed:
            break
    return np.array(d)


@pytest.mark.parametrize("case", ["random", "badly_scaled", "delay_chain", "integers", "no_outputs"])
def test_state_balancing_gives_the_scales_of_its_definition_to_the_bit(rng, case):
    for trial in range(20):
        n, m, p = int(rng.integers(1, 14)), int(rng.integers(1, 4)), int(rng.integers(1, 4))
        a, b, c = rng.normal(size=(n, n)), rng.normal(size=(n, m)), rng.normal(size=(p, n))
        if case == "badly_scaled":  # states in units from 1e-6 to 1e6 of one another
            t = 10.0 ** rng.uniform(-6, 6, size=n)
            a, b, c = a * (1 / t)[:, None] * t[None, :], b / t[:, None], c * t[None, :]
        elif case == "delay_chain":  # a shift register: most entries zero
            a = np.diag(np.ones(n - 1), -1) if n > 1 else np.zeros((1, 1))
            b = np.zeros((n, m))
            b[0] = rng.normal(size=m)
            c = np.zeros((p, n))
            c[:, -1] = rng.normal(size=p)
        elif case == "integers":  # exact powers of two in the ratios: ties in the rounding
            a, b, c = (np.round(4 * x) for x in (a, b, c))
        elif case == "no_outputs":
            c = np.zeros((0, n))
        got = balance_states(a, b, c)
        assert np.array_equal(got, _balance_by_definition(a, b, c)), (case, trial)
        assert np.all(np.log2(got) == np.round(np.log2(got)))  # powers of two: the scaling is exact
