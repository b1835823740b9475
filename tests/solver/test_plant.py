"""Steady-state gain, relative gain array, condition number and poles of a plant."""

from __future__ import annotations

import math

import numpy as np
import pytest

from service.solver.models.properties import (
    balanced_condition_number,
    gain_condition_number,
    input_gain_error_magnification,
    open_loop_poles,
    plant_properties,
    plant_warnings,
    relative_gain_array,
    relative_gain_warning,
    steady_state_gain,
)
from service.solver.models.sampling import sample_zero_order_hold
from service.solver.models.transfer import TransferElement, transfer_matrix_model

E = TransferElement

# Wood and Berry distillation column (Wood & Berry 1973, Chem. Eng. Sci. 28:1707), minutes.
WOOD_BERRY_GAIN = np.array([[12.8, -18.9], [6.6, -19.4]])
WOOD_BERRY = [
    [E(12.8, (16.7,), 1.0), E(-18.9, (21.0,), 3.0)],
    [E(6.6, (10.9,), 7.0), E(-19.4, (14.4,), 3.0)],
]


@pytest.mark.parametrize("ts", [1.0, 0.7])
def test_wood_berry_keeps_its_published_gains_and_rga(ts: float) -> None:
    model = transfer_matrix_model(WOOD_BERRY, sample_time=ts)
    props = plant_properties(model.a, model.b, model.c, model.d)
    # zero-order hold keeps the steady-state gain of each element (final value theorem)
    np.testing.assert_allclose(props.steady_state.gain, WOOD_BERRY_GAIN, rtol=1e-11)
    assert props.steady_state.finite and not props.steady_state.integrating.any()
    # Bristol 1966, 2 x 2: lambda_11 = 1 / (1 - g12 g21 / (g11 g22)), rows and columns sum to 1
    g = WOOD_BERRY_GAIN
    lam = 1.0 / (1.0 - g[0, 1] * g[1, 0] / (g[0, 0] * g[1, 1]))
    np.testing.assert_allclose(props.relative_gain, [[lam, 1 - lam], [1 - lam, lam]], rtol=1e-10)
    assert lam == pytest.approx(2.01, abs=0.005)  # value recalled from memory for this column
    # poles: e^(-Ts/tau) of the four lags, and zero for every dead-time register state
    lags = sorted(math.exp(-ts / tau) for tau in (16.7, 21.0, 10.9, 14.4))
    assert sorted(props.poles[:4].real) == pytest.approx(lags, rel=1e-12)
    np.testing.assert_array_equal(props.poles[4:], 0.0)
    assert props.condition_number == pytest.approx(gain_condition_number(WOOD_BERRY_GAIN), rel=1e-9)


@pytest.mark.parametrize("seed", range(5))
def test_rga_rows_and_columns_sum_to_one_and_ignore_scaling(seed: int) -> None:
    # Properties of the RGA (Bristol 1966): each row and column sums to one, and
    # Lambda(S1 G S2) = Lambda(G) for diagonal scalings S1, S2.
    rng = np.random.default_rng(seed)
    size = 2 + seed % 3
    g = rng.normal(size=(size, size))
    rga = relative_gain_array(g)
    np.testing.assert_allclose(rga.sum(axis=0), 1.0, atol=1e-10)
    np.testing.assert_allclose(rga.sum(axis=1), 1.0, atol=1e-10)
    s1, s2 = np.diag(rng.uniform(0.1, 10, size)), np.diag(rng.uniform(0.1, 10, size))
    np.testing.assert_allclose(relative_gain_array(s1 @ g @ s2), rga, rtol=1e-9, atol=1e-9)
    # and it is the elementwise product with the transposed inverse (definition)
    np.testing.assert_allclose(rga, g * np.linalg.inv(g).T, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_steady_state_gain_of_a_stable_model_is_the_final_value(seed: int) -> None:
    # Final value theorem: a held unit input settles at C (I - A)^-1 B + D; checked by
    # running the model to steady state (a direct simulation).
    rng = np.random.default_rng(seed)
    n, m, p = 4, 2, 3
    a = rng.normal(size=(n, n))
    a *= 0.8 / np.abs(np.linalg.eigvals(a)).max()
    b, c, d = rng.normal(size=(n, m)), rng.normal(size=(p, n)), rng.normal(size=(p, m))
    x = np.zeros((n, m))
    for _ in range(400):
        x = a @ x + b
    np.testing.assert_allclose(steady_state_gain(a, b, c, d).gain, c @ x + d, rtol=1e-10, atol=1e-12)


def test_integrating_pair_is_marked_with_its_ramp_rate_and_the_others_keep_their_gains() -> None:
    # A level (integrating element K/s: dy/dt = K u, so y rises K Ts per sample of a unit
    # input under zero-order hold) beside settling elements with known gains.
    ts = 0.5
    grid = [
        [E(2.0, (3.0,), 1.2), E(0.4, (), 0.7, integrating=True)],
        [E(-1.0, (2.0, 5.0), 0.0), None],
    ]
    model = transfer_matrix_model(grid, sample_time=ts)
    steady = steady_state_gain(model.a, model.b, model.c, model.d)
    np.testing.assert_array_equal(steady.integration_order, [[0, 1], [0, 0]])
    assert steady.gain[0, 0] == pytest.approx(2.0, rel=1e-12)
    assert steady.gain[1, 0] == pytest.approx(-1.0, rel=1e-12)
    assert steady.gain[1, 1] == 0.0
    assert math.isnan(steady.gain[0, 1])
    assert steady.ramp_rate[0, 1] == pytest.approx(0.4 * ts, rel=1e-12)
    np.testing.assert_array_equal(steady.ramp_rate[[0, 1, 1], [0, 0, 1]], 0.0)
    props = plant_properties(model.a, model.b, model.c, model.d)
    assert props.relative_gain is None and props.condition_number is None
    assert plant_warnings(props) == []


def test_integrating_element_with_a_lag_ramps_at_its_gain() -> None:
    # K/(s (tau s + 1)) ramps at K per time unit once the lag has settled (final value
    # theorem on s G(s)).
    ts = 2.0
    model = transfer_matrix_model([[E(0.3, (4.0,), 1.0, integrating=True)]], sample_time=ts)
    steady = steady_state_gain(model.a, model.b, model.c)
    assert steady.integration_order[0, 0] == 1
    assert steady.ramp_rate[0, 0] == pytest.approx(0.3 * ts, rel=1e-11)


def test_double_integrator_in_disguise_integrates_twice() -> None:
    # d2y/dt2 = u sampled (elementary calculus: a parabola), then hidden by a random change
    # of state coordinates, which changes no transfer function.
    ts = 0.4
    s = sample_zero_order_hold([[0.0, 1.0], [0.0, 0.0]], [[0.0], [1.0]], sample_time=ts)
    rng = np.random.default_rng(3)
    basis = rng.normal(size=(3, 3))
    a = np.zeros((3, 3))
    a[:2, :2], a[2, 2] = s.a, 0.5
    b = np.vstack([s.b, [[1.0]]])
    c = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 2.0]])
    a_t, b_t, c_t = basis @ a @ np.linalg.inv(basis), basis @ b, c @ np.linalg.inv(basis)
    steady = steady_state_gain(a_t, b_t, c_t)
    np.testing.assert_array_equal(steady.integration_order, [[2], [0]])
    assert math.isnan(steady.ramp_rate[0, 0]) and math.isnan(steady.gain[0, 0])
    # the settling output: 2 / (1 - 0.5) = 4 (geometric series)
    assert steady.gain[1, 0] == pytest.approx(4.0, rel=1e-10)


def test_integrator_that_no_output_sees_does_not_integrate() -> None:
    # An unobservable integrating mode has no effect on any transfer function.
    a = np.diag([1.0, 0.5])
    b = np.array([[1.0], [1.0]])
    c = np.array([[0.0, 1.0]])
    steady = steady_state_gain(a, b, c)
    assert steady.integration_order[0, 0] == 0
    assert steady.gain[0, 0] == pytest.approx(2.0, rel=1e-14)


def test_condition_number_and_near_singular_warning() -> None:
    # 2-norm condition number of diag(10, 0.001) is 10 / 0.001 = 1e4 (definition).
    a = np.diag([0.5, 0.5])
    b = np.diag([5.0, 0.0005])
    props = plant_properties(a, b, np.eye(2))
    assert props.condition_number == pytest.approx(1e4, rel=1e-12)
    (warning,) = plant_warnings(props)
    assert warning.code == "near_singular_gain"
    assert plant_warnings(props, near_singular=1e5) == []
    # a rank-one gain: singular up to rounding
    assert gain_condition_number([[1.0, 2.0], [2.0, 4.0]]) > 1e15
    assert gain_condition_number([[1.0, 0.0], [0.0, 0.0]]) == math.inf
    singular = plant_properties(a, np.array([[1.0, 2.0], [2.0, 4.0]]), np.eye(2))
    assert singular.relative_gain is None


def test_non_square_plant_has_no_rga_but_a_condition_number() -> None:
    props = plant_properties(np.diag([0.5, 0.2]), np.eye(2), np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]]))
    assert props.relative_gain is None
    assert props.condition_number is not None and math.isfinite(props.condition_number)


def test_poles_are_the_eigenvalues_by_descending_modulus() -> None:
    a = np.array([[0.2, 0.0, 0.0], [0.0, 0.0, -0.9], [0.0, 0.9, 0.0]])
    poles = open_loop_poles(a)
    np.testing.assert_allclose(np.abs(poles), [0.9, 0.9, 0.2])
    np.testing.assert_allclose(sorted(poles.imag), [-0.9, 0.0, 0.9], atol=1e-15)


def test_model_without_states_is_its_feed_through() -> None:
    steady = steady_state_gain(np.zeros((0, 0)), np.zeros((0, 2)), np.zeros((1, 0)), [[3.0, -1.0]])
    np.testing.assert_array_equal(steady.gain, [[3.0, -1.0]])


def test_large_relative_gains_warns_from_ten_and_quotes_the_worst_input_gain_error() -> None:
    # Reference: the relative gain array by its definition G .* (G^-1)^T, and the diagonal of
    # G E G^-1 over the corners of |e_j| <= 0.2 by numpy (sum_j lambda_ij e_j).
    mild = plant_properties(np.diag([0.5, 0.5]), np.array([[2.0, 0.3], [0.2, 1.5]]), np.eye(2))
    assert [w.code for w in plant_warnings(mild)] == []
    gain = np.array([[1.0, 0.9], [0.9, 1.0]])  # lambda_11 = 1 / (1 - 0.81) = 5.26
    assert relative_gain_warning(plant_properties(np.diag([0.5, 0.5]), gain, np.eye(2))) is None
    gain = np.array([[1.0, 0.95], [0.95, 1.0]])  # lambda_11 = 1 / (1 - 0.9025) = 10.26
    props = plant_properties(np.diag([0.5, 0.5]), gain * 0.5, np.eye(2))
    warning = relative_gain_warning(props, output_labels=["a", "b"])
    assert warning is not None and warning.code == "large_relative_gains"
    assert "10.3" in warning.message
    worst = max(np.abs(np.diag(gain @ np.diag(e) @ np.linalg.inv(gain))).max() for e in [(0.2, 0.2), (0.2, -0.2)])
    np.testing.assert_allclose(input_gain_error_magnification(props.relative_gain).max(), worst, rtol=1e-10)
    assert f"{100 * worst:.4g} %" in warning.message
    # a non-square plant has no relative gain array and no such warning
    wide = plant_properties(np.diag([0.5, 0.2]), np.eye(2), np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]]))
    assert relative_gain_warning(wide) is None


def test_the_balanced_condition_number_does_not_move_with_the_units() -> None:
    # Found in the ill-conditioned plants' audit: with rows and columns equilibrated to powers of
    # two, the figure the near_singular_gain verdict judges took 754 for a gain in Pa, %, degC and
    # 1399 with the same outputs in Pa, ppm, degC, so the verdict flipped with a unit.
    # Reference: the least condition number over all diagonal scalings, found by scipy.optimize
    # (Nelder-Mead on the logarithms of the scalings, common practice), which no unit changes.
    import scipy.optimize

    normalized = np.array([[1.0, 0.8, 0.3], [0.6, 0.5, 0.2], [0.4, 0.3, 0.104]])
    gain = np.array([5000.0, 2.0, 0.5])[:, None] * normalized / np.array([100.0, 80.0, 10.0])[None, :]

    def scaled_cond(logs: np.ndarray) -> float:
        return float(np.linalg.cond(np.exp(logs[:3])[:, None] * gain * np.exp(logs[3:])[None, :]))

    start = np.concatenate([-np.log(np.abs(gain).max(axis=1)), np.zeros(3)])
    least = scipy.optimize.minimize(scaled_cond, start, method="Nelder-Mead", options={"maxiter": 20000}).fun
    rng = np.random.default_rng(7)
    figures = [balanced_condition_number(gain)]
    figures.append(balanced_condition_number(np.diag([1.0, 1e4, 1.0]) @ gain))  # % -> ppm
    for _ in range(20):
        rows, columns = 10.0 ** rng.uniform(-9, 9, 3), 10.0 ** rng.uniform(-9, 9, 3)
        figures.append(balanced_condition_number(rows[:, None] * gain * columns[None, :]))
    np.testing.assert_allclose(figures, figures[0], rtol=1e-9)
    assert least * (1 - 1e-6) <= figures[0] <= 1.2 * least
    # the verdict with it: the same in % and ppm
    props = [plant_properties(np.diag([0.5] * 3), g * 0.5, np.eye(3)) for g in (gain, np.diag([1.0, 1e4, 1.0]) @ gain)]
    codes = [[w.code for w in plant_warnings(p, balanced=True)] for p in props]
    assert codes[0] == codes[1]
    # zeros: a triangular gain, a zero row and column are handled, and stay unit-free
    triangular = np.array([[2.0, 0.0], [3e5, 1e-3]])
    assert balanced_condition_number(triangular) == pytest.approx(
        balanced_condition_number(np.diag([1e-6, 1.0]) @ triangular @ np.diag([1.0, 1e3])), rel=1e-9
    )
    assert balanced_condition_number(np.array([[1.0, 0.0], [0.0, 0.0]])) == math.inf
