"""Natural sizes of signals and states, and the default filter they make free of units.

References: the least-squares fit in logarithms written out for one pair (closed form), a
change of variables of the Kalman filter (rescaling a signal or a state by ``t`` is the
similarity ``x' = D x`` or ``y' = T y`` of the same filter, textbook), and numpy's lstsq
for the fit itself. Plants: an invented column with two lags, an integrating level and two
valves; random stable plants with a fixed seed.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.solver.estimation.estimator import design_estimator, integrating_outputs
from service.solver.estimation.sizes import natural_sizes

A = np.array([[0.9, 0.0, 0.0], [0.05, 0.8, 0.0], [0.0, 0.0, 1.0]])  # two lags and a level
B = np.array([[0.1, 0.0], [0.0, 0.3], [0.05, -0.04]])  # two valves
C = np.array([[1.0, 1.0, 0.0], [0.0, 0.0, 1.0]])  # composition and level


def test_one_pair_splits_its_step_response_size_between_output_and_input():
    # one state, one sample: M = |c b|; min-norm least squares of log M = log y - log u
    # gives log y = -log u = log(M) / 2 (closed form)
    sizes = natural_sizes(np.array([[0.5]]), np.array([[0.2]]), np.array([[4.0]]))
    assert sizes.outputs[0] == pytest.approx(np.sqrt(0.8))
    assert sizes.inputs[0] == pytest.approx(1 / np.sqrt(0.8))
    # the state: 1 / |c / y| = y / 4
    assert sizes.states[0] == pytest.approx(np.sqrt(0.8) / 4.0)


def test_a_fixed_signal_keeps_size_one_and_the_others_fit_around_it():
    sizes = natural_sizes(A, B, C, fixed_inputs=[True, True])
    np.testing.assert_array_equal(sizes.inputs, [1.0, 1.0])
    # with the inputs fixed, each output's size is the geometric mean of its row of M (lstsq)
    response, total = np.zeros((2, 2)), np.zeros((2, 2))
    power = B.copy()
    for _ in range(3):
        response = response + C @ power
        total += response**2
        power = A @ power
    magnitude = np.sqrt(total / 3)
    np.testing.assert_allclose(sizes.outputs, np.exp(np.log(magnitude).mean(axis=1)), rtol=1e-12)


# Beyond about 1e9 the Riccati equation of the rescaled filter loses digits to rounding (its
# entries span 1e18 and more): the filter is then the same to about 1e-5 only.
SCALES = [1e-9, 1e-6, 1e-3, 1e3, 1e6, 1e9]


@pytest.mark.parametrize("kind", ["per_output", "input_disturbance", "kalman"])
@pytest.mark.parametrize("scale", SCALES)
@pytest.mark.parametrize("what", ["output", "input", "state"])
def test_the_default_filter_is_the_same_in_any_units(kind, scale, what):
    """Rescale one output, input or state by ``scale``: the default filter is the same filter
    in the new coordinates, so its poles agree, and so do its gains once brought back."""
    t = np.array([scale, 1.0])
    d = np.array([scale, 1.0, 1.0])
    a, b, c = A, B, C
    if what == "output":
        c = C * t[:, None]
    elif what == "input":
        b = B / t[None, :]
    else:
        a, b, c = A * d[:, None] / d[None, :], B * d[:, None], C / d[None, :]
    extra = {"disturbance": "input"} if kind == "kalman" else {}
    base = design_estimator(A, B, C, kind=kind, **extra)  # type: ignore[arg-type]
    moved = design_estimator(a, b, c, kind=kind, **extra)  # type: ignore[arg-type]
    np.testing.assert_allclose(np.sort_complex(moved.poles), np.sort_complex(base.poles), rtol=1e-6, atol=1e-8)
    n = A.shape[0]
    if what == "output":  # the plant states' rows of L read measurements: columns scale by 1/t
        np.testing.assert_allclose(moved.gain[:n] * t[None, :], base.gain[:n], rtol=1e-5, atol=1e-8)
    elif what == "state":  # rows of the plant states scale by d
        np.testing.assert_allclose(moved.gain[:n] / d[:, None], base.gain[:n], rtol=1e-5, atol=1e-8)


@pytest.mark.parametrize("scale", SCALES)
def test_which_outputs_integrate_does_not_depend_on_the_states_units(scale):
    # a state rescaled by 1e-6 once made the composition look integrating (its rank decision
    # was taken on the unbalanced I - A)
    d = np.array([scale, 1.0, 1.0])
    flags = integrating_outputs(A * d[:, None] / d[None, :], C / d[None, :])
    assert flags.tolist() == [False, True]


def test_random_plants_give_the_same_filter_when_every_signal_is_rescaled():
    rng = np.random.default_rng(20261202)
    for _ in range(10):
        n, m, p = 4, 2, 2
        a = np.diag(rng.uniform(0.3, 0.95, n)) + 0.05 * rng.normal(size=(n, n))
        b, c = rng.normal(size=(n, m)), rng.normal(size=(p, n))
        t, s, d = 10.0 ** rng.integers(-6, 7, p), 10.0 ** rng.integers(-6, 7, m), 10.0 ** rng.integers(-6, 7, n)
        base = design_estimator(a, b, c, kind="output_disturbance")
        moved = design_estimator(
            a * d[:, None] / d[None, :],
            b * d[:, None] / s[None, :],
            t[:, None] * c / d[None, :],
            kind="output_disturbance",
        )
        np.testing.assert_allclose(np.sort_complex(moved.poles), np.sort_complex(base.poles), rtol=1e-6, atol=1e-8)
