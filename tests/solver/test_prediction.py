"""Prediction matrices against a direct simulation of the plant."""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.design.prediction import prediction_matrices
from tests.conftest import random_plant


def simulate_outputs(a, b, c, x0, u_prev, moves, steps):
    """Outputs z(k+1..k+steps) of the plant driven by u(k+j) = u(k-1) + sum of moves."""
    x, u, out = x0.copy(), u_prev.copy(), []
    for j in range(steps):
        if j < len(moves):
            u = u + moves[j]
        x = a @ x + b @ u
        out.append(c @ x)
    return np.array(out)


@pytest.mark.parametrize(("hp", "hu", "hw"), [(1, 1, 1), (7, 3, 1), (12, 12, 1), (15, 4, 5), (9, 2, 9)])
def test_stacked_prediction_equals_simulation(rng, hp, hu, hw):
    # The definition of the prediction (the state equation applied step by step).
    n, m, p = 5, 2, 3
    a, b, c = random_plant(rng, n, m, p)
    pred = prediction_matrices(a, b, c, prediction=hp, control=hu, first_penalized=hw)
    x0, u_prev = rng.normal(size=n), rng.normal(size=m)
    moves = rng.normal(size=(hu, m))
    stacked = pred.free_state @ x0 + pred.free_input @ u_prev + pred.moves @ moves.reshape(-1)
    direct = simulate_outputs(a, b, c, x0, u_prev, moves, hp)[hw - 1 :]
    np.testing.assert_allclose(stacked.reshape(-1, p), direct, rtol=1e-12, atol=1e-12)
    assert pred.moves.shape == ((hp - hw + 1) * p, hu * m)
    assert pred.penalized_steps == hp - hw + 1


def test_recursion_matches_matrix_powers(rng):
    # Reference: numpy.linalg.matrix_power, for C A^i and the summed step responses.
    a, b, c = random_plant(rng, 4, 2, 2)
    pred = prediction_matrices(a, b, c, prediction=10, control=4)
    for i in range(1, 11):
        power = np.linalg.matrix_power(a, i)
        np.testing.assert_allclose(pred.free_state[(i - 1) * 2 : i * 2], c @ power, atol=1e-13)
        summed = sum(np.linalg.matrix_power(a, k) for k in range(i))
        np.testing.assert_allclose(pred.step_response[i], c @ summed @ b, atol=1e-13)


def test_moves_matrix_is_block_lower_triangular_toeplitz(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    pred = prediction_matrices(a, b, c, prediction=6, control=3)
    g = pred.moves.reshape(6, 2, 3, 2)
    for i in range(6):
        for j in range(3):
            expected = pred.step_response[i + 1 - j] if j <= i else np.zeros((2, 2))
            np.testing.assert_array_equal(g[i, :, j, :], expected)


@pytest.mark.parametrize(("n", "m", "p", "steps"), [(1, 1, 1, 1), (6, 3, 2, 30), (3, 1, 4, 2)])
def test_step_responses_match_scipy_dstep(rng, n, m, p, steps):
    # Reference: scipy.signal.dstep (the unit step response of (A, B, C, 0), one input at a
    # time, sampled at k = 0..steps): S_k of each input is its column of the output at k.
    import scipy.signal

    from service.solver.design.prediction import step_response_coefficients

    a, b, c = random_plant(rng, n, m, p)
    _, step = step_response_coefficients(a, b, c, steps)
    _, responses = scipy.signal.dstep((a, b, c, np.zeros((p, m)), 1.0), n=steps + 1)
    for j in range(m):
        np.testing.assert_allclose(step[:, :, j], responses[j], rtol=1e-12, atol=1e-12)
