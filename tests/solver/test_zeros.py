"""Zeros of non-minimal models: transmission zeros on the minimal part, decoupling zeros named.

References: python-control's ``minreal`` (slycot's TB01PD) and ``zeros`` (slycot's AB08ND);
slycot's AB08ND directly for the invariant zeros of the whole realization; and the textbook
definitions (Rosenbrock, *State-space and Multivariable Theory*, 1970, ch. 3): an invariant zero
is a rank drop of the system matrix ``[[zI - A, -B], [C, 0]]``, an input-decoupling zero a rank
drop of ``[zI - A, B]``, an output-decoupling zero of ``[zI - A; C]``, and a transmission zero
of a square plant a ``z`` (not a pole) where ``G(z) = C (zI - A)^-1 B`` is singular.
"""

from __future__ import annotations

import control
import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
import slycot

from service.solver.evaluation.advice import decoupling_zero_advice, non_minimum_phase_advice, transmission_zeros
from service.solver.models.zeros import minimal_realization, plant_zeros, system_zeros

#: The model of the issue: 1.2 is a mode no input moves.
A = np.diag([0.5, 1.2])
B = np.array([[1.0], [0.0]])
C = np.array([[1.0, 1.0]])


def _matched(ours: np.ndarray, theirs: np.ndarray) -> float:
    """Largest distance of an optimal one-to-one matching (inf when the counts differ)."""
    if ours.size != theirs.size:
        return float("inf")
    if ours.size == 0:
        return 0.0
    distance = np.abs(ours[:, None] - theirs[None, :])
    rows, cols = scipy.optimize.linear_sum_assignment(distance)
    return float(distance[rows, cols].max())


def _rank(matrix: np.ndarray) -> int:
    s = np.linalg.svd(matrix, compute_uv=False)
    return int(np.count_nonzero(s > 1e-9 * s[0]))


def _slycot_invariant_zeros(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Finite invariant zeros of the whole realization by slycot's AB08ND (SLICOT)."""
    n, m = b.shape
    p = c.shape[0]
    out = slycot.ab08nd(n, m, p, a, b, c, np.zeros((p, m)))
    nu, af, bf = out[0], out[8], out[9]
    if nu == 0:
        return np.zeros(0, complex)
    return scipy.linalg.eigvals(af[:nu, :nu], bf[:nu, :nu])


def test_an_uncontrollable_mode_is_a_decoupling_zero_not_a_transmission_zero():
    zeros = plant_zeros(A, B, C)
    assert zeros.transmission.size == 0
    assert _matched(zeros.input_decoupling, np.array([1.2])) < 1e-12
    assert zeros.output_decoupling.size == 0
    assert zeros.minimal_states == 1
    # Textbook: the system matrix drops rank at 1.2 (an invariant zero) because [zI - A, B] does
    # (input-decoupling), while G(z) -> 1 / (1.2 - 0.5) there (the mode cancels, G stays finite
    # and nonsingular): no transmission zero.
    system = np.block([[1.2 * np.eye(2) - A, -B], [C, np.zeros((1, 1))]])
    assert _rank(system) == 2
    assert _rank(np.hstack([1.2 * np.eye(2) - A, B])) == 1
    g = C @ np.linalg.solve((1.2 + 1e-9) * np.eye(2) - A, B)
    assert g[0, 0] == pytest.approx(1.0 / 0.7, rel=1e-8)
    # slycot's AB08ND on the whole realization finds 1.2 as an invariant zero; python-control
    # on the minimal realization (TB01PD) finds no zero, as we do.
    assert _matched(_slycot_invariant_zeros(A, B, C), np.array([1.2])) < 1e-10
    assert _matched(system_zeros(A, B, C), np.array([1.2])) < 1e-10
    reduced = control.minreal(control.ss(A, B, C, 0, True), verbose=False)
    assert reduced.nstates == 1 and control.zeros(reduced).size == 0


def test_the_advice_names_the_decoupling_zero_and_no_inverse_response():
    assert transmission_zeros(A, B, C).size == 0
    assert non_minimum_phase_advice(A, B, C, prediction=2) is None
    advice = decoupling_zero_advice(A, B, C)
    assert advice is not None and advice.code == "decoupling_zeros"
    assert "1.2" in advice.message and "input-decoupling" in advice.message
    assert "not a transmission zero" in advice.message
    # A stable decoupling zero is harmless and not worth a warning.
    assert decoupling_zero_advice(np.diag([0.5, 0.3]), B, C) is None


def test_an_unseen_unstable_mode_is_an_output_decoupling_zero():
    a = np.array([[0.5, 0.0], [0.3, 1.5]])  # the second state is driven but never seen
    b = np.array([[1.0], [1.0]])
    c = np.array([[2.0, 0.0]])
    zeros = plant_zeros(a, b, c)
    assert zeros.transmission.size == 0 and zeros.input_decoupling.size == 0
    assert _matched(zeros.output_decoupling, np.array([1.5])) < 1e-12
    assert _rank(np.vstack([1.5 * np.eye(2) - a, c])) == 1  # Rosenbrock: [zI - A; C] drops rank
    advice = decoupling_zero_advice(a, b, c)
    assert advice is not None and "output-decoupling" in advice.message


def test_a_true_non_minimum_phase_zero_survives_next_to_a_decoupling_zero():
    # G(z) = (z - 1.5) / ((z - 0.5)(z - 0.8)) in controllable canonical form, plus a mode at 1.2
    # that no input moves but the output sees.
    a = np.array([[1.3, -0.4, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.2]])
    b = np.array([[1.0], [0.0], [0.0]])
    c = np.array([[1.0, -1.5, 1.0]])
    zeros = plant_zeros(a, b, c)
    assert _matched(zeros.transmission, np.array([1.5])) < 1e-10
    assert _matched(zeros.input_decoupling, np.array([1.2])) < 1e-10
    theirs = control.zeros(control.minreal(control.ss(a, b, c, 0, True), verbose=False))
    assert _matched(zeros.transmission, theirs) < 1e-8
    advice = non_minimum_phase_advice(a, b, c, prediction=1)
    assert advice is not None and "1.5" in advice.message and "1.2" not in advice.message


@pytest.mark.parametrize("seed", range(40))
def test_random_non_minimal_plants_against_python_control_and_slycot(seed):
    """A random minimal square plant with uncontrollable and unobservable modes appended, in
    random orthogonal coordinates with state units from 1e-6 to 1e6."""
    rng = np.random.default_rng(seed)
    n0, m = int(rng.integers(2, 6)), int(rng.integers(1, 3))
    ku, ko = int(rng.integers(0, 3)), int(rng.integers(0, 3))
    n = n0 + ku + ko
    a = np.zeros((n, n))
    b = np.zeros((n, m))
    c = np.zeros((m, n))
    a0, b0, c0 = 0.4 * rng.normal(size=(n0, n0)), rng.normal(size=(n0, m)), rng.normal(size=(m, n0))
    a[:n0, :n0], b[:n0], c[:, :n0] = a0, b0, c0
    uncontrollable = rng.uniform(-1.5, 1.5, ku)
    unobservable = rng.uniform(-1.5, 1.5, ko)
    u, o = slice(n0, n0 + ku), slice(n0 + ku, n)
    a[u, u] = np.diag(uncontrollable)
    a[:n0, u] = rng.normal(size=(n0, ku))  # seen by the outputs, moved by no input
    c[:, u] = rng.normal(size=(m, ku))
    a[o, o] = np.diag(unobservable)
    a[o, :n0] = rng.normal(size=(ko, n0))  # moved by the inputs, seen by no output
    b[o] = rng.normal(size=(ko, m))
    q = np.linalg.qr(rng.normal(size=(n, n)))[0]
    s = 10.0 ** rng.uniform(-6, 6, n)
    at, bt, ct = (q.T @ a @ q) / s[:, None] * s[None, :], (q.T @ b) / s[:, None], (c @ q) * s[None, :]

    zeros = plant_zeros(at, bt, ct)
    reference = control.zeros(control.ss(a0, b0, c0, np.zeros((m, m)), True))  # AB08ND on the minimal part
    scale = max(1.0, float(np.abs(reference).max(initial=0.0)))
    assert _matched(zeros.transmission, reference) < 1e-6 * scale
    assert _matched(zeros.input_decoupling, uncontrollable.astype(complex)) < 1e-6
    assert _matched(zeros.output_decoupling, unobservable.astype(complex)) < 1e-6
    assert zeros.minimal_states == n0
    # Invariant zeros of the whole realization (AB08ND) = transmission + decoupling zeros.
    invariant = _slycot_invariant_zeros(a, b, c)
    together = np.concatenate([zeros.transmission, zeros.input_decoupling, zeros.output_decoupling])
    assert _matched(together, invariant) < 1e-6 * scale
    # The minimal realization has the model's transfer matrix G(z) = C (zI - A)^-1 B.
    minimal = minimal_realization(at, bt, ct)
    for z in (1.7, -2.3, 0.4 + 1.9j):
        ours = minimal.c @ np.linalg.solve(z * np.eye(minimal.states) - minimal.a, minimal.b)
        model = c0 @ np.linalg.solve(z * np.eye(n0) - a0, b0)
        assert np.allclose(ours, model, rtol=1e-7, atol=1e-7 * np.abs(model).max())


def test_a_minimal_model_keeps_all_its_states_and_its_zeros():
    rng = np.random.default_rng(7)
    a, b, c = 0.3 * rng.normal(size=(6, 6)), rng.normal(size=(6, 2)), rng.normal(size=(2, 6))
    zeros = plant_zeros(a, b, c)
    assert zeros.minimal_states == 6
    assert zeros.input_decoupling.size == 0 and zeros.output_decoupling.size == 0
    assert _matched(zeros.transmission, system_zeros(a, b, c)) < 1e-9


@pytest.mark.parametrize("exponents", [(0, 0, -9), (0, 0, 9), (-12, 0, 12), (12, -6, -12)])
def test_state_units_change_no_decoupling_verdict(exponents):
    """A level seen by one output and moved by both valves, its state in units from 1e-12 to 1e12:
    still minimal, the same zero (the zeros of ``(S^-1 A S, S^-1 B, C S)`` are those of
    ``(A, B, C)``, a similarity)."""
    a = np.array([[0.9, 0.0, 0.0], [0.05, 0.8, 0.0], [0.0, 0.0, 1.0]])
    b = np.array([[0.1, 0.0], [0.0, 0.3], [0.05, -0.04]])
    c = np.array([[1.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    base = plant_zeros(a, b, c)
    s = 10.0 ** np.array(exponents, dtype=float)
    found = plant_zeros(a * s[:, None] / s[None, :], b * s[:, None], c / s[None, :])
    assert found.minimal_states == base.minimal_states == 3
    assert found.input_decoupling.size == 0 and found.output_decoupling.size == 0
    assert _matched(found.transmission, base.transmission) < 1e-5
    assert _matched(base.transmission, _slycot_invariant_zeros(a, b, c)) < 1e-10
