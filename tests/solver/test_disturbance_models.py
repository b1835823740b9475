"""The per-output disturbance model: output bias for self-regulating outputs, rate bias for levels.

Sources: the detectability condition rank [[I - A, -Bd], [C, Cd]] = n + nd with (A, C)
detectable (Pannocchia and Rawlings 2003, AIChE J. 49, 426-437, from the Hautus/PBH test),
checked here independently with ``numpy.linalg.matrix_rank``; the steady-state Kalman filter
from ``scipy.linalg.solve_discrete_are`` (Kalman 1960).  Plants invented: two compositions and
a level; a column with a spare input.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from service.errors import NumericalError
from service.solver.estimation.estimator import (
    augmented_model,
    default_disturbances,
    design_estimator,
    integrating_outputs,
)

# Two compositions (lags) and a level (integrator at z = 1), four inputs: more inputs than outputs.
A = np.diag([0.9, 0.8, 1.0])
B = np.array([[0.5, 0.2, 0.0, 0.1], [0.1, 0.6, 0.3, 0.0], [0.05, -0.04, 0.0, -0.08]])
C = np.eye(3)


def _hautus_detectable(a, c, bd, cd):
    """Pannocchia and Rawlings 2003: (A, C) detectable and rank [[I - A, -Bd], [C, Cd]] = n + nd."""
    n, nd = a.shape[0], bd.shape[1]
    for z in np.linalg.eigvals(a):
        if abs(z) >= 1.0 - 1e-9 and np.linalg.matrix_rank(np.vstack([z * np.eye(n) - a, c])) < n:
            return False
    return np.linalg.matrix_rank(np.block([[np.eye(n) - a, -bd], [c, cd]])) == n + nd


def test_the_default_puts_a_rate_bias_on_the_level_only():
    assert list(integrating_outputs(A, C)) == [False, False, True]
    assert default_disturbances(A, C) == ("output", "output", "rate")
    # Units of an output do not change the choice (a relative test per row).
    assert default_disturbances(A, np.diag([1e-4, 1.0, 1e3]) @ C) == ("output", "output", "rate")


@pytest.mark.parametrize("choice", list(itertools.product(["output", "rate"], repeat=3)))
def test_each_choice_is_accepted_exactly_when_the_hautus_test_passes(choice):
    flags = integrating_outputs(A, C)
    if any(kind == "rate" and not flag for kind, flag in zip(choice, flags, strict=True)):
        with pytest.raises(NumericalError) as caught:
            design_estimator(A, B, C, disturbances=choice)
        assert caught.value.field == ("estimator", "disturbances")
        return
    _, _, _, bd, cd = augmented_model(A, B, C, "per_output", disturbances=choice)
    expected = _hautus_detectable(A, C, bd, cd)
    if expected:
        est = design_estimator(A, B, C, disturbances=choice)
        assert est.spectral_radius < 1.0 and est.disturbances == choice
    else:
        with pytest.raises(NumericalError) as caught:
            design_estimator(A, B, C, disturbances=choice)
        # The advice names the output and says what to use; it never sends the user back.
        assert "'y3' integrates, so use 'rate' for it" in str(caught.value)
    assert expected == (choice[2] == "rate")


def test_the_rate_bias_ramps_the_level_one_unit_per_sample():
    _, _, _, bd, cd = augmented_model(A, B, C, "per_output", disturbances=("output", "output", "rate"))
    # x(k+1) = A x + Bd d: with d = 1 the level rises by exactly 1 per sample, the others not at all.
    x = np.zeros(3)
    for _ in range(5):
        x = A @ x + bd @ np.array([0.0, 0.0, 1.0])
    np.testing.assert_allclose(C @ x, [0.0, 0.0, 5.0], atol=1e-12)
    np.testing.assert_array_equal(cd, np.diag([1.0, 1.0, 0.0]))


def test_neither_uniform_model_works_here_and_the_advice_is_not_circular():
    with pytest.raises(NumericalError) as output_model:
        design_estimator(A, B, C, kind="output_disturbance")
    with pytest.raises(NumericalError) as input_model:
        design_estimator(A, B, C, kind="input_disturbance")
    for caught in (output_model, input_model):
        assert "per_output" in str(caught.value)
        assert "Use output_disturbance" not in str(caught.value)
        assert "Use input_disturbance" not in str(caught.value)
    est = design_estimator(A, B, C)  # the default
    assert est.kind == "per_output" and est.disturbance_size == 3
