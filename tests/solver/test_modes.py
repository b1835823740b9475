"""Plant modes no manipulated input can move: PBH test and its warning."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.solver.design.controller import design_controller
from service.solver.models.modes import uncontrollable_mode_warnings, uncontrollable_modes
from service.solver.models.transfer import TransferElement, transfer_matrix_model

E = TransferElement
ROTATION = 1.1 * np.array([[np.cos(0.3), -np.sin(0.3)], [np.sin(0.3), np.cos(0.3)]])


def kalman_rank(a: np.ndarray, b: np.ndarray) -> int:
    """Reference: rank of [B, AB, ..., A^(n-1) B] (Kalman rank test, standard linear systems
    theory) by numpy.linalg.matrix_rank, relative tolerance 1e-9 of its largest singular value."""
    n = a.shape[0]
    blocks = [b]
    for _ in range(n - 1):
        blocks.append(a @ blocks[-1])
    ctrb = np.hstack(blocks)
    return int(np.linalg.matrix_rank(ctrb, tol=1e-9 * np.linalg.norm(ctrb, 2)))


def hand_case() -> tuple[np.ndarray, np.ndarray]:
    """Block-diagonal plant, derived by hand.

    States: x1 integrator driven by u1; x2 integrator no input drives (same eigenvalue 1);
    x3 lag 0.5 driven by u1 and u2; x4 lag 0.3, x5 lag 0.9996 and the growing rotation
    x6, x7 (1.1 e^(+/-0.3j)) undriven.  PBH by hand: at z = 1 the rows of x1 and x2 in
    A - I are zero and only x1's row of B is not, rank 6 of 7, one mode; at 0.3 and 0.9996
    the undriven row is zero throughout; at each eigenvalue of the rotation its 2 x 2 block
    minus z I has rank 1 and B is zero there.  x3 alone has B nonzero at 0.5: controllable.
    Uncontrollable: 1, 0.9996, 0.3 and the pair; on or outside the unit circle (|z| >=
    0.999): 1, 0.9996 and the pair.
    """
    a = scipy.linalg.block_diag(1.0, 1.0, 0.5, 0.3, 0.9996, ROTATION)
    b = np.zeros((7, 2))
    b[0, 0] = 1.0
    b[2] = [0.4, -0.7]
    return a, b


HAND_MODES = np.array([1.1 * np.exp(0.3j), 1.1 * np.exp(-0.3j), 1.0, 0.9996, 0.3])


def same_multiset(found: np.ndarray, expected: np.ndarray, *, atol: float) -> None:
    key = lambda z: (round(z.real, 6), round(z.imag, 6))  # noqa: E731
    assert len(found) == len(expected), (found, expected)
    np.testing.assert_allclose(sorted(found, key=key), sorted(expected, key=key), atol=atol)


def test_hand_case_modes_and_the_kalman_count() -> None:
    a, b = hand_case()
    modes = uncontrollable_modes(a, b)
    same_multiset(modes, HAND_MODES, atol=1e-12)
    assert list(np.abs(modes)) == sorted(np.abs(modes), reverse=True)
    # Controllable subspace span{x1, x3}: Kalman rank 2 = 7 - 5.
    assert kalman_rank(a, b) == 2 == 7 - len(modes)


def test_hand_case_warning_names_the_poles_and_states_on_or_outside_the_circle() -> None:
    a, b = hand_case()
    labels = ["level", "inflow total", "temperature lag", "fast lag", "slow lag", "swing a", "swing b"]
    (warning,) = uncontrollable_mode_warnings(a, b, labels=labels)
    assert warning.code == "uncontrollable_mode"
    text = warning.message
    assert "4 modes" in text and "z = 1, carried by 'inflow total'" in text
    assert "z = 0.9996, carried by 'slow lag'" in text
    assert "the pair z = 1.05087 +/- 0.325072j, carried by 'swing a', 'swing b'" in text
    assert "'fast lag'" not in text and "0.3," not in text  # inside the circle: harmless
    assert "no tuning can fix" in text and "realization" in text and "disturbance" in text
    assert "'level'" not in text and "'temperature lag'" not in text


def test_uncontrollable_poles_stay_among_the_closed_loop_poles() -> None:
    # [w; 0] with w' A = z w', w' B = 0 is a left eigenvector of the loop on [x; u(k-1)]
    # (its B-columns vanish): module notes of service.solver.models.modes.
    a, b = hand_case()
    c = np.zeros((2, 7))
    c[0, 0], c[1, 2], c[0, 1] = 1.0, 1.0, 1.0
    design = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.1, 0.1], prediction=20, control=4)
    poles = design.loop.poles
    for z in HAND_MODES:
        assert np.min(np.abs(poles - z)) < 1e-9, z
    assert not design.loop.stable


def test_modes_survive_a_change_of_state_coordinates() -> None:
    # Controllability is invariant under x -> T x (standard linear systems theory).
    a, b = hand_case()
    t = np.linalg.qr(np.random.default_rng(11).normal(size=(7, 7)))[0] @ np.diag([1, 2, 0.5, 3, 1, 0.7, 1.5])
    t_inv = np.linalg.inv(t)
    same_multiset(uncontrollable_modes(t @ a @ t_inv, t @ b), HAND_MODES, atol=1e-9)
    assert kalman_rank(t @ a @ t_inv, t @ b) == 2


def test_repeated_undriven_eigenvalues_count_once_each() -> None:
    # A = I (2 x 2), B = e1: rank [0, e1] = 1, one mode at 1; with no input both are.
    np.testing.assert_array_equal(uncontrollable_modes(np.eye(2), [[1.0], [0.0]]), [1.0])
    np.testing.assert_array_equal(uncontrollable_modes(np.eye(2), np.zeros((2, 0))), [1.0, 1.0])
    # A Jordan block with no input: one left eigenvector, so one mode by PBH (geometric
    # count) though the Kalman rank says 2 (module notes).
    assert len(uncontrollable_modes([[1.0, 1.0], [0.0, 1.0]], [[0.0], [0.0]])) == 1
    # driven at the end of the chain it is controllable ([B, AB] = [[0, 1], [1, 1]])
    assert uncontrollable_modes([[1.0, 1.0], [0.0, 1.0]], [[0.0], [1.0]]).size == 0


def test_input_units_do_not_make_a_mode_uncontrollable() -> None:
    # A valve in tiny units: B scaled by 1e-12 changes no rank in exact arithmetic.
    a = np.diag([1.0, 0.5])
    b = np.array([[1.0], [1.0]])
    assert uncontrollable_modes(a, b).size == 0
    assert uncontrollable_modes(a, 1e-12 * b).size == 0
    assert kalman_rank(a, 1e-12 * b) == 2


@pytest.mark.parametrize("seed", range(12))
def test_random_systems_agree_with_the_kalman_rank(seed: int) -> None:
    # Kalman decomposition built on purpose: a random controllable part (Ac, Bc), a random
    # uncontrollable part Au (diagonalizable almost surely) coupled through A12, then hidden
    # by a random orthogonal change of coordinates.
    rng = np.random.default_rng(seed)
    nc, nu, m = int(rng.integers(1, 4)), int(rng.integers(0, 3)), int(rng.integers(1, 3))
    n = nc + nu
    a = rng.normal(size=(n, n))
    a[nc:, :nc] = 0.0
    b = np.zeros((n, m))
    b[:nc] = rng.normal(size=(nc, m))
    q = np.linalg.qr(rng.normal(size=(n, n)))[0]
    a_t, b_t = q @ a @ q.T, q @ b
    modes = uncontrollable_modes(a_t, b_t)
    assert len(modes) == n - kalman_rank(a_t, b_t) == nu
    same_multiset(modes, np.linalg.eigvals(a[nc:, nc:]), atol=1e-8)
    # a fully random pair is controllable almost surely: both tests say so
    full_a, full_b = rng.normal(size=(n, n)), rng.normal(size=(n, m))
    assert uncontrollable_modes(full_a, full_b).size == 0 and kalman_rank(full_a, full_b) == n
    warnings = uncontrollable_mode_warnings(a_t, b_t)
    assert bool(warnings) == bool(np.any(np.abs(modes) >= 1.0 - 1e-3))


def test_a_level_with_one_integrator_per_path_warns_and_the_shared_one_does_not() -> None:
    # Derived by hand: a level integrating a valve (rate -0.05 per sample) and an inflow
    # (0.02), with one integrator per path: x(k+1) = x(k) + [-0.05; 0] u + [0; 0.02] d,
    # y = x1 + x2.  The inflow's integrator x2 has B row zero: a mode at 1 no input moves.
    a, b = np.eye(2), np.array([[-0.05], [0.0]])
    (warning,) = uncontrollable_mode_warnings(a, b, labels=["level from valve", "level from inflow"])
    assert "z = 1, carried by 'level from inflow'" in warning.message
    # The transfer-matrix conversion shares one integrator per row: nothing to warn.
    model = transfer_matrix_model(
        [[E(-0.05, (), 0.3, integrating=True)]],
        sample_time=1.0,
        disturbance_elements=[[E(0.02, (), integrating=True)]],
    )
    assert uncontrollable_modes(model.a, model.b).size == 0
    assert uncontrollable_mode_warnings(model.a, model.b) == []


def test_an_output_only_a_disturbance_integrates_is_a_genuine_warning() -> None:
    # y2 ramps with d1 alone (0.7/s): no valve can hold it, whatever the realization.
    model = transfer_matrix_model(
        [[E(1.0, (2.0,))], [E(0.5, (3.0,), 1.0)]],
        sample_time=1.0,
        disturbance_elements=[[None], [E(0.7, (), integrating=True)]],
    )
    labels = [s.describe() for s in model.states]
    (warning,) = uncontrollable_mode_warnings(model.a, model.b, labels=labels)
    assert "z = 1, carried by 'integrator of y2'" in warning.message
    np.testing.assert_allclose(uncontrollable_modes(model.a, model.b), [1.0], atol=1e-12)


def test_loop_poles_only_narrow_the_search(rng):
    # Screening by the closed-loop poles of a design changes nothing: an uncontrollable mode
    # is a pole under every feedback (PBH; standard linear systems theory).
    from service.solver.design.controller import design_controller
    from service.solver.models.modes import uncontrollable_mode_warnings

    a = np.diag([1.0, 0.5, 0.8])
    b = np.array([[0.0], [1.0], [1.0]])
    c = np.array([[1.0, 1.0, 0.0]])
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[0.1], prediction=10, control=3)
    screened = uncontrollable_mode_warnings(a, b, loop_poles=d.loop.poles)
    assert screened == uncontrollable_mode_warnings(a, b) and len(screened) == 1
    assert uncontrollable_mode_warnings(a, b, loop_poles=np.array([0.1 + 0j])) == []
