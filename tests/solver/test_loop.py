"""The control loop on an estimate (service.solver.estimation.loop), tested directly.

References: the free prediction ``Fx_aug = [Cz A_aug^i]`` for ``i = Hw..Hp`` (the standard
prediction formula of predictive control), built here with ``numpy.linalg.matrix_power``;
the separation principle (the whole loop's poles are the controller's and the estimator's
together, common practice) checked against eigenvalues computed here with
``scipy.linalg.eigvals``; and the plant-controller realization of
``service.solver.estimation.realization`` as a second, independent coding of the same loop.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.loop import control_loop, whole_loop
from service.solver.estimation.realization import closed_loop_poles, controller_system, plant_system
from tests.conftest import random_plant


def _plant(rng, layout):
    """Practitioners' layouts, invented numbers: ``"wide"`` has more inputs (3) than outputs
    (2); ``"level"`` is square with an integrating level (a pole at z = 1) as its second output."""
    if layout == "wide":
        return random_plant(rng, 4, 3, 2, radius=0.9)
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    a = scipy.linalg.block_diag(a, [[1.0]])
    b = np.vstack([b, [[0.05, -0.04]]])
    c = np.hstack([c, np.zeros((2, 1))])
    c[1, :] = [0.0, 0.0, 0.0, 1.0]  # the second output is the level
    return a, b, c


CASES = [("wide", "output_disturbance"), ("wide", "kalman"), ("level", "input_disturbance")]


def _design(a, b, c, prediction):
    m = b.shape[1]
    return design_controller(
        a, b, c, output_weight=[1.0, 3.0], move_weight=[0.2, 0.5, 0.3][:m], prediction=prediction, control=3
    )


@pytest.mark.parametrize(("layout", "kind"), CASES)
def test_free_prediction_is_the_augmented_model_s_power_series(rng, layout, kind):
    a, b, c = _plant(rng, layout)
    d = _design(a, b, c, 8)
    est = design_estimator(a, b, c, kind=kind)
    loop = control_loop(d, est)
    expected = np.vstack([est.c_controlled @ np.linalg.matrix_power(est.a, i) for i in range(1, 9)])
    np.testing.assert_allclose(loop.free_state, expected, rtol=1e-10, atol=1e-12)
    assert loop.penalized_steps == 8 and loop.horizon_gain is d.gain.horizon
    x, u = rng.normal(size=est.a.shape[0]), rng.normal(size=b.shape[1])
    np.testing.assert_allclose(loop.free_prediction(x, u), loop.free_state @ x + loop.free_input @ u)


@pytest.mark.parametrize(("layout", "kind"), CASES)
def test_whole_loop_poles_are_the_separated_poles_and_the_realization_s(rng, layout, kind):
    a, b, c = _plant(rng, layout)
    d = _design(a, b, c, 20)
    n, m = b.shape
    est = design_estimator(a, b, c, kind=kind)
    whole = whole_loop(control_loop(d, est))
    # Separation, with the two halves' eigenvalues computed here.
    ai = np.block([[a, b], [np.zeros((m, n)), np.eye(m)]])
    bi = np.vstack([b, np.eye(m)])
    controller = scipy.linalg.eigvals(ai - bi @ np.hstack([d.gain.state, d.gain.previous_input]))
    estimator = scipy.linalg.eigvals((np.eye(est.a.shape[0]) - est.gain @ est.c_measured) @ est.a)
    union = np.concatenate([controller, estimator])
    np.testing.assert_allclose(np.sort_complex(whole.poles), np.sort_complex(union), atol=1e-7)
    # The same loop coded as plant and controller realizations.
    realized = closed_loop_poles(plant_system(a, b, c), controller_system(d, est))
    np.testing.assert_allclose(np.sort_complex(whole.poles), np.sort_complex(realized), atol=1e-7)
    assert whole.spectral_radius == pytest.approx(np.abs(union).max(), abs=1e-7)


def test_a_loop_of_another_model_is_refused(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    d = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[1.0, 1.0], prediction=6, control=2)
    est = design_estimator(1.1 * a, b, c, kind="output_disturbance")
    with pytest.raises(ValueError, match="not the model of the design"):
        control_loop(d, est)
