"""Feed-forward gain of measured disturbances."""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.design.controller import design_controller
from service.solver.design.feedforward import disturbance_free_response, feedforward_gain
from service.solver.design.gain import optimal_moves
from service.solver.models.transfer import TransferElement, transfer_matrix_model

E = TransferElement


def _random_plant(seed: int, n: int = 4, m: int = 2, md: int = 2, p: int = 2):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, n))
    a *= 0.95 / np.abs(np.linalg.eigvals(a)).max()
    return a, rng.normal(size=(n, m)), rng.normal(size=(n, md)), rng.normal(size=(p, n)), rng


@pytest.mark.parametrize(("hp", "hw"), [(6, 1), (8, 3)])
def test_free_disturbance_response_equals_a_simulation_of_the_held_disturbance(hp: int, hw: int) -> None:
    # Direct simulation of x(k+1) = A x(k) + Bd d from rest, d held at a unit step.
    a, _, bd, c, _ = _random_plant(1)
    dd = np.array([[0.5, 0.0], [0.0, -2.0]])
    fd = disturbance_free_response(a, bd, c, prediction=hp, first_penalized=hw, feed_through=dd)
    assert fd.shape == ((hp - hw + 1) * 2, 2)
    for j in range(2):
        x = np.zeros(4)
        rows = []
        for i in range(1, hp + 1):
            x = a @ x + bd[:, j]
            if i >= hw:
                rows.append(c @ x + dd[:, j])
        np.testing.assert_allclose(fd[:, j], np.concatenate(rows), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("seed", range(4))
def test_first_move_with_feed_forward_is_the_full_unconstrained_optimum(seed: int) -> None:
    # The receding-horizon law must equal the first move of dU* = H^-1 G'Q E when the
    # disturbance's free response is part of E (the normal equations of the design notes).
    a, b, bd, c, rng = _random_plant(seed)
    hp, hu, hw = 7, 3, 2
    design = design_controller(
        a, b, c, output_weight=[1.0, 3.0], move_weight=[0.2, 0.5], prediction=hp, control=hu, first_penalized=hw
    )
    fd = disturbance_free_response(a, bd, c, prediction=hp, first_penalized=hw)
    kd = feedforward_gain(design.gain.horizon, fd)
    x, u_prev, d, r = rng.normal(size=4), rng.normal(size=2), rng.normal(size=2), rng.normal(size=2)
    pred = design.prediction
    error = np.tile(r, hp - hw + 1) - pred.free_state @ x - pred.free_input @ u_prev - fd @ d
    full = optimal_moves(design.hessian, design.weighted, design.output_root, error)
    law = design.gain.setpoint @ r - design.gain.state @ x - design.gain.previous_input @ u_prev - kd @ d
    np.testing.assert_allclose(law, full[:2], rtol=1e-10, atol=1e-12)


def test_feed_forward_cancels_a_measured_step_disturbance_in_the_nominal_prediction() -> None:
    # With no move penalty and as many moves as predicted outputs (Hu = Hp, p = m, C B
    # invertible), the optimal moves put the whole predicted trajectory on the setpoint, so
    # the disturbance's predicted effect is cancelled exactly (G square and invertible).
    a, b, bd, _, _ = _random_plant(5, n=2)
    c = np.eye(2)
    hp = 4
    design = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.0, 0.0], prediction=hp, control=hp)
    fd = disturbance_free_response(a, bd, c, prediction=hp)
    d = np.array([1.0, -0.5])
    error = -fd @ d  # at rest, setpoint zero
    moves = optimal_moves(design.hessian, design.weighted, design.output_root, error)
    predicted = fd @ d + design.prediction.moves @ moves
    np.testing.assert_allclose(predicted, 0.0, atol=1e-10)
    kd = feedforward_gain(design.gain.horizon, fd)
    np.testing.assert_allclose(-kd @ d, moves[:2], rtol=1e-10, atol=1e-12)

    # and in the nominal closed loop the measured step never shows at the outputs, while
    # without feed-forward it does
    def run(use_feed_forward: bool) -> np.ndarray:
        x, u = np.zeros(2), np.zeros(2)
        out = []
        for _ in range(6):
            du = -design.gain.state @ x - design.gain.previous_input @ u - (kd @ d if use_feed_forward else 0.0)
            u = u + du
            x = a @ x + b @ u + bd @ d
            out.append(c @ x)
        return np.array(out)

    np.testing.assert_allclose(run(True), 0.0, atol=1e-10)
    assert np.abs(run(False)).max() > 1e-2


def test_feed_forward_on_a_transfer_matrix_with_disturbance_elements() -> None:
    # Wood and Berry column (Wood & Berry 1973, Chem. Eng. Sci. 28:1707) with its feed-flow
    # disturbance elements 3.8 e^-8.1s/(14.9s+1) and 4.9 e^-3.4s/(13.2s+1) (the disturbance
    # values recalled from memory).  The feed-forward gain must reproduce the full optimum.
    grid = [
        [E(12.8, (16.7,), 1.0), E(-18.9, (21.0,), 3.0)],
        [E(6.6, (10.9,), 7.0), E(-19.4, (14.4,), 3.0)],
    ]
    feed = [[E(3.8, (14.9,), 8.1)], [E(4.9, (13.2,), 3.4)]]
    model = transfer_matrix_model(grid, sample_time=1.0, disturbance_elements=feed)
    assert model.strictly_proper
    hp, hu = 30, 5
    design = design_controller(
        model.a, model.b, model.c, output_weight=[1.0, 1.0], move_weight=[0.1, 0.1], prediction=hp, control=hu
    )
    fd = disturbance_free_response(model.a, model.b_disturbance, model.c, prediction=hp)
    kd = feedforward_gain(design.gain.horizon, fd)
    assert kd.shape == (2, 1)
    error = -fd[:, 0]
    full = optimal_moves(design.hessian, design.weighted, design.output_root, error)
    np.testing.assert_allclose(-kd[:, 0], full[:2], rtol=1e-9, atol=1e-12)
    # the last block row of Fd tends to the disturbance's steady-state gains as Hp grows
    long = disturbance_free_response(model.a, model.b_disturbance, model.c, prediction=400)
    np.testing.assert_allclose(long[-2:, 0], [3.8, 4.9], rtol=1e-9)
