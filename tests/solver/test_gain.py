"""The first-move gain against references outside the project."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.errors import HessianNotPositiveDefinite
from service.solver.design.controller import design_controller
from service.solver.design.gain import optimal_moves
from tests.conftest import random_plant
from tests.references import incremental_lqr_gain


def test_long_horizon_gain_equals_infinite_horizon_lqr(rng):
    # Standard result: as Hp = Hu grows the receding-horizon gain tends to the LQR gain
    # (scipy.linalg.solve_discrete_are is the reference).
    n, m, p = 4, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.9)
    q, r = np.diag([1.0, 2.0]), np.diag([0.1, 0.3])
    d = design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.1, 0.3], prediction=150, control=150)
    lqr = incremental_lqr_gain(a, b, c, q, r)
    np.testing.assert_allclose(np.hstack([d.gain.state, d.gain.previous_input]), lqr, atol=1e-9)


def test_long_horizon_gain_with_full_weights(rng):
    # Same reference with full (non-diagonal) symmetric positive-definite weights.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.85)
    q = np.array([[2.0, 0.5], [0.5, 1.0]])
    r = np.array([[0.2, 0.05], [0.05, 0.1]])
    d = design_controller(a, b, c, output_weight=q, move_weight=r, prediction=120, control=120)
    np.testing.assert_allclose(
        np.hstack([d.gain.state, d.gain.previous_input]), incremental_lqr_gain(a, b, c, q, r), atol=1e-9
    )


@pytest.mark.parametrize(
    ("a", "b", "c", "q", "r"), [(0.5, 1.0, 1.0, 1.0, 1.0), (0.9, 0.3, 2.0, 3.0, 0.5), (1.2, -0.7, 1.5, 1.0, 0.01)]
)
def test_scalar_one_step_gain_in_closed_form(a, b, c, q, r):
    # Derived by hand: with Hp = Hu = 1, z(k+1) = c a x + c b u(k-1) + c b du, so
    # V = q (c a x + c b u(k-1) + c b du - r0)^2 + r du^2 and dV/d(du) = 0 gives
    # du = kh (r0 - c a x - c b u(k-1)) with kh = q c b / (q c^2 b^2 + r).
    kh = q * c * b / (q * c**2 * b**2 + r)
    d = design_controller([[a]], [[b]], [[c]], output_weight=[q], move_weight=[r], prediction=1, control=1)
    assert d.gain.horizon[0, 0] == pytest.approx(kh, rel=1e-13)
    assert d.gain.state[0, 0] == pytest.approx(kh * c * a, rel=1e-13)
    assert d.gain.previous_input[0, 0] == pytest.approx(kh * c * b, rel=1e-13)
    assert d.gain.setpoint[0, 0] == pytest.approx(kh, rel=1e-13)
    assert d.hessian.matrix[0, 0] == pytest.approx(q * c**2 * b**2 + r, rel=1e-13)


def test_horizon_gain_is_first_rows_of_the_full_solution(rng):
    # Receding horizon (common practice): only the first move of H^-1 G'Q E is applied.
    # Reference: the dense formula with numpy.linalg.inv and kron weights, as written.
    n, m, p, hp, hu = 4, 2, 3, 12, 4
    a, b, c = random_plant(rng, n, m, p)
    qd, rd = rng.uniform(0.5, 2.0, p), rng.uniform(0.1, 1.0, m)
    d = design_controller(a, b, c, output_weight=qd, move_weight=rd, prediction=hp, control=hu)
    g = d.prediction.moves
    qbar, rbar = np.kron(np.eye(hp), np.diag(qd)), np.kron(np.eye(hu), np.diag(rd))
    full = np.linalg.inv(g.T @ qbar @ g + rbar) @ g.T @ qbar
    np.testing.assert_allclose(d.gain.horizon, full[:m], atol=1e-12)
    np.testing.assert_allclose(d.gain.state, full[:m] @ d.prediction.free_state, atol=1e-12)
    np.testing.assert_allclose(d.gain.setpoint, full[:m] @ np.tile(np.eye(p), (hp, 1)), atol=1e-12)
    e = rng.normal(size=hp * p)
    np.testing.assert_allclose(optimal_moves(d.hessian, d.weighted, d.output_root, e), full @ e, atol=1e-12)


def test_optimal_moves_solve_the_least_squares_problem(rng):
    # Reference: numpy.linalg.lstsq on the stacked problem min |[Wbar G; Rbar^1/2] dU - [Wbar E; 0]|.
    n, m, p, hp, hu = 5, 3, 2, 10, 3
    a, b, c = random_plant(rng, n, m, p)
    q = np.array([[1.0, 0.3], [0.3, 0.5]])
    d = design_controller(a, b, c, output_weight=q, move_weight=[0.2, 0.1, 0.4], prediction=hp, control=hu)
    e = rng.normal(size=hp * p)
    wq = scipy.linalg.sqrtm(q).real
    stacked = np.vstack(
        [np.kron(np.eye(hp), wq) @ d.prediction.moves, np.sqrt(np.kron(np.eye(hu), np.diag([0.2, 0.1, 0.4])))]
    )
    rhs = np.concatenate([np.kron(np.eye(hp), wq) @ e, np.zeros(hu * m)])
    reference = np.linalg.lstsq(stacked, rhs, rcond=None)[0]
    np.testing.assert_allclose(optimal_moves(d.hessian, d.weighted, d.output_root, e), reference, atol=1e-10)


def test_positive_move_weights_always_give_a_positive_definite_hessian(rng):
    # Fact of the trade: G'QG is PSD, so R > 0 makes H PD whatever the plant (common practice).
    for _ in range(20):
        n, m, p = rng.integers(1, 6, size=3)
        a, b, c = random_plant(rng, n, m, p, radius=rng.uniform(0.1, 1.5))
        b[:, 0] = 0.0  # even an input that acts on nothing
        d = design_controller(
            a, b, c, output_weight=rng.uniform(0, 1, p), move_weight=rng.uniform(1e-3, 1, m), prediction=8, control=3
        )
        assert d.hessian.smallest_eigenvalue > 0
        reference = scipy.linalg.eigvalsh(d.hessian.matrix)
        assert d.hessian.smallest_eigenvalue == pytest.approx(reference[0], rel=1e-10)
        assert d.hessian.largest_eigenvalue == pytest.approx(reference[-1], rel=1e-10)
        assert d.hessian.condition_number == pytest.approx(np.linalg.cond(d.hessian.matrix, 2), rel=1e-8)


def test_zero_move_weight_with_more_inputs_than_outputs_is_rejected(rng):
    # Fact of the trade: with m > p and R = 0, G cannot have full column rank, so H is singular.
    a, b, c = random_plant(rng, 3, 3, 2)
    with pytest.raises(HessianNotPositiveDefinite) as caught:
        design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.0, 0.0, 0.0], prediction=10, control=2)
    message = str(caught.value)
    assert "u1, u2, u3" in message and "no move penalty" in message
    assert "cannot see" in message and "full column rank" in message
    assert "3 inputs and only 2 controlled output" in message
    assert caught.value.field == ("weights", "move")


def test_zero_move_weight_on_one_blind_input_names_that_input(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    b[:, 1] = 0.0  # the second input acts on nothing
    with pytest.raises(HessianNotPositiveDefinite) as caught:
        design_controller(
            a,
            b,
            c,
            output_weight=[1.0, 1.0],
            move_weight=[0.1, 0.0],
            prediction=6,
            control=2,
            input_labels=["steam", "outlet"],
        )
    assert "the moves of outlet carry no move penalty" in str(caught.value)


def test_move_weights_below_the_rounding_of_collinear_inputs_are_not_called_absent():
    # Found in an audit of identification: a model fitted to a test that moved two inputs
    # together has gains of about 1e10 in one direction (invented numbers below). Next to
    # G'QG near 1e20 the move weights of 1e-4 and 0.1 are below its rounding (a relative
    # 1e-16, the double precision of IEEE 754), and the two inputs' difference is invisible,
    # so H is singular; the 422 said the moves "carry no move penalty" while weights were given.
    a = np.array([[0.9]])
    b = np.array([[1e9, 2e9]])  # the same direction: u1 - u2 / 2 moves nothing
    c = np.array([[1.0]])
    with pytest.raises(HessianNotPositiveDefinite) as caught:
        design_controller(
            a,
            b,
            c,
            output_weight=[1.0],
            move_weight=[1e-4, 0.1],
            prediction=10,
            control=2,
            input_labels=["fuel_gas", "feed_flow"],
        )
    message = str(caught.value)
    assert "fuel_gas, feed_flow" in message
    assert "no move penalty" in message and "rounding level" in message and "in effect" in message
    assert "Raise these inputs' move weights" in message
    assert caught.value.field == ("weights", "move")


def test_an_unstable_plant_over_a_long_horizon_is_not_blamed_on_unpenalized_moves():
    # Found in an audit of hostile input: the example vessel with a[0][3] = 100 (open-loop pole
    # modulus 2.3 by numpy.linalg.eigvals) and Hp = 30 grows its predictions by about 2.3^30, so
    # G'QG reaches about 1e22 and the move weights of 0.1 are below its rounding (a relative
    # 1e-16, the double precision of IEEE 754). The 422 said the moves "carry no move penalty"
    # while they had 0.1 each and the step-response matrix had full rank over them.
    a = np.array([[0.92, 0.05, 0.0, 100.0], [0.0, 0.85, 0.0, 0.0], [0.0, 0.0, 0.95, 0.03], [0.02, 0.0, 0.0, 0.80]])
    b = np.array([[0.10, -0.02], [0.20, 0.0], [0.0, 0.08], [0.05, 0.15]])
    c = np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]])
    assert max(abs(np.linalg.eigvals(a))) > 2.0
    with pytest.raises(HessianNotPositiveDefinite) as caught:
        design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.1, 0.1], prediction=30, control=5)
    message = str(caught.value)
    assert "no move penalty" not in message and "rounding level" in message
    assert "shorten the prediction horizon" in message
    # and the shorter horizon it advises designs
    design_controller(a, b, c, output_weight=[1.0, 2.0], move_weight=[0.1, 0.1], prediction=8, control=5)


def test_zero_move_weight_with_full_rank_moves_is_accepted(rng):
    # With m <= p and G of full column rank, R = 0 is well-posed (H = G'QG is PD).
    a, b, c = random_plant(rng, 4, 2, 2)
    d = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.0, 0.0], prediction=10, control=3)
    assert d.hessian.smallest_eigenvalue > 0


@pytest.mark.parametrize(("hp", "hu", "hw"), [(1, 1, 1), (12, 4, 1), (12, 12, 1), (15, 5, 4), (9, 3, 9)])
def test_toeplitz_hessian_equals_the_dense_product(rng, hp, hu, hw):
    # Reference: the definition H = (Wbar G)'(Wbar G) + blockdiag(R), formed densely.
    from service.solver.design.gain import hessian_matrix, toeplitz_hessian, weighted_moves
    from service.solver.design.prediction import prediction_matrices
    from service.solver.design.weights import weight_root

    n, m, p = 4, 2, 3
    a, b, c = random_plant(rng, n, m, p)
    pred = prediction_matrices(a, b, c, prediction=hp, control=hu, first_penalized=hw)
    q = np.array([[2.0, 0.3, 0.0], [0.3, 1.0, 0.1], [0.0, 0.1, 0.5]])
    r = np.array([[0.2, 0.05], [0.05, 0.1]])
    root = weight_root(q)
    weighted = weighted_moves(pred, root)
    dense = hessian_matrix(weighted, r, control=hu)
    fast = toeplitz_hessian(pred, weighted, root, r)
    np.testing.assert_allclose(fast, dense, rtol=0, atol=1e-13 * np.abs(dense).max())
    assert np.array_equal(fast, fast.T)
