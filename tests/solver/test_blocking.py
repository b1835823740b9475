"""Move blocking: a column selection of the step-response matrix."""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.design.blocking import blocking_matrix, expand_moves, select_moves
from service.solver.design.controller import design_controller
from service.solver.design.gain import optimal_moves
from tests.conftest import random_plant

KW = {"output_weight": [1.0, 2.0], "move_weight": [0.1, 0.4], "prediction": 12, "control": 6}


@pytest.mark.parametrize("terminal", ["none", "riccati"])
def test_blocking_with_every_step_free_equals_no_blocking_exactly(rng, terminal):
    # Definition: listing every step selects every column of G in order (M = I).
    a, b, c = random_plant(rng, 4, 2, 2)
    plain = design_controller(a, b, c, terminal=terminal, **KW)
    free = design_controller(a, b, c, terminal=terminal, blocking=range(6), **KW)
    for x, y in [
        (plain.prediction.moves, free.prediction.moves),
        (plain.hessian.matrix, free.hessian.matrix),
        (plain.gain.horizon, free.gain.horizon),
        (plain.gain.state, free.gain.state),
        (plain.gain.previous_input, free.gain.previous_input),
        (plain.gain.setpoint, free.gain.setpoint),
    ]:
        assert np.array_equal(x, y)
    assert free.blocking == tuple(range(6))


def test_blocking_reduces_the_hessian_size(rng):
    a, b, c = random_plant(rng, 4, 2, 2)
    d = design_controller(a, b, c, blocking=[0, 2, 5], **KW)
    assert d.hessian.matrix.shape == (3 * 2, 3 * 2)
    assert d.prediction.moves.shape == (12 * 2, 3 * 2)


def test_blocked_hessian_is_the_projection_of_the_full_one(rng):
    # Algebra of the formulation: dU = M dU_b gives H_b = M' H M (with the 0/1 matrix M).
    a, b, c = random_plant(rng, 3, 2, 2)
    full = design_controller(a, b, c, **KW)
    steps = [0, 1, 4]
    blocked = design_controller(a, b, c, blocking=steps, **KW)
    m = blocking_matrix(steps, control=6, inputs=2)
    np.testing.assert_allclose(blocked.hessian.matrix, m.T @ full.hessian.matrix @ m, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(select_moves(full.prediction.moves, steps, inputs=2), full.prediction.moves @ m)


def test_blocked_moves_are_the_best_held_input_sequence(rng):
    # The blocked optimum is the least-squares optimum over sequences that move only at the
    # listed steps: compare with numpy.linalg.lstsq on the stacked problem [W G M; R^1/2 M].
    a, b, c = random_plant(rng, 3, 1, 1)
    steps = [0, 3]
    d = design_controller(a, b, c, output_weight=[2.0], move_weight=[0.5], prediction=8, control=5, blocking=steps)
    error = rng.normal(size=8)
    du_b = optimal_moves(d.hessian, d.weighted, d.output_root, error)
    full = design_controller(a, b, c, output_weight=[2.0], move_weight=[0.5], prediction=8, control=5)
    m = blocking_matrix(steps, control=5, inputs=1)
    stacked = np.vstack([np.sqrt(2.0) * full.prediction.moves @ m, np.sqrt(0.5) * np.eye(2)])
    reference, *_ = np.linalg.lstsq(stacked, np.r_[np.sqrt(2.0) * error, 0.0, 0.0], rcond=None)
    np.testing.assert_allclose(du_b, reference, rtol=1e-10, atol=1e-12)
    dU = expand_moves(du_b, steps, control=5, inputs=1)
    np.testing.assert_array_equal(dU[[1, 2, 4]], 0.0)  # held between the listed steps
    np.testing.assert_array_equal(dU[[0, 3]], du_b)
    # The first move is still du(k): Kh E equals the first entry.
    assert d.gain.horizon @ error == pytest.approx(du_b[0], rel=1e-12, abs=1e-14)


def test_blocking_a_single_move_is_control_horizon_one(rng):
    # Definition: moving only at step 0 is the same problem as Hu = 1.
    a, b, c = random_plant(rng, 3, 2, 2)
    one = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.1, 0.1], prediction=10, control=1)
    blocked = design_controller(
        a, b, c, output_weight=[1.0, 1.0], move_weight=[0.1, 0.1], prediction=10, control=4, blocking=[0]
    )
    np.testing.assert_allclose(blocked.gain.state, one.gain.state, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(blocked.hessian.matrix, one.hessian.matrix, rtol=1e-12)
