"""Identification: recovery of known plants from simulated plant tests, against independent references."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
import scipy.signal

from service.solver.identification.data import hold_missing, resample_held, resample_interpolated, sample_grid
from service.solver.identification.diagnostics import (
    find_outliers,
    fit_measures,
    frozen_runs,
    moves_correlation,
    outliers_of_fit,
    residual_correlations,
)
from service.solver.identification.least_squares import (
    FIR_BLOCKS,
    FIR_SINGLE,
    PairSpec,
    fit_output,
    lag_blocks,
    model_output,
)
from service.solver.identification.process_models import pair_response
from service.solver.models.transfer import TransferElement, transfer_matrix_model
from tests.conftest import random_steps

FO, SO, INT = "first_order_dead_time", "second_order_dead_time", "integrating_dead_time"


def binary_signal(rng: np.random.Generator, count: int, shortest: int) -> np.ndarray:
    """A random binary test signal (+-1, holds of ``shortest`` to 4x ``shortest`` samples), rest first."""
    out = np.empty(count)
    level, k = 1.0, 20
    out[:20] = 0.0
    while k < count:
        hold = int(rng.integers(shortest, 4 * shortest))
        out[k : k + hold] = level
        level = -level
        k += hold
    return out


def two_input_test(truth: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """An invented two-input test of one output: binary inputs (seeded), first-order pairs of
    parameters ``truth``, an offset of 120 and noise at 5 % of the output's spread (a
    signal-to-noise ratio of about 20 in amplitude: a realistic plant test, common practice).
    Returns ``(y, u)``."""
    rng = np.random.default_rng(11)
    n = 900
    u = np.column_stack([binary_signal(rng, n, 12), 3.0 * binary_signal(rng, n, 8)])
    clean = sum(pair_response(FO, t, u[:, j], sample_time=1.0) for j, t in enumerate(truth))
    return 120.0 + clean + rng.normal(scale=0.05 * np.std(clean), size=n), u


def dlsim_response(element: TransferElement, u: np.ndarray) -> np.ndarray:
    """Reference: the element's exact sampled state-space model (service transfer module) run by scipy.signal.dlsim."""
    sampled = transfer_matrix_model([[element]], sample_time=1.0)
    _, y, _ = scipy.signal.dlsim((sampled.a, sampled.b, sampled.c, sampled.d, 1.0), u[:, None])
    return y[:, 0]


def test_pair_response_equals_the_sampled_state_space_model() -> None:
    rng = np.random.default_rng(0)
    u = rng.normal(size=200)
    for structure, theta, element in (
        (FO, [2.0, 7.0, 3.4], TransferElement(2.0, (7.0,), 3.4)),
        (SO, [-1.0, 6.0, 2.0, 0.6], TransferElement(-1.0, (6.0, 2.0), 0.6)),
        (INT, [0.05, 2.5], TransferElement(0.05, (), 2.5, integrating=True)),
    ):
        ours = pair_response(structure, np.array(theta), u, sample_time=1.0)
        np.testing.assert_allclose(ours, dlsim_response(element, u), rtol=1e-9, atol=1e-12)


def test_first_order_recovery_from_a_binary_test_with_noise() -> None:
    # Two inputs on one output, fractional dead times, noise at 5 % of the output's spread
    # (signal-to-noise ratio about 20 in amplitude: a realistic plant test, common practice).
    truth = [np.array([2.5, 10.0, 3.4]), np.array([-0.4, 6.0, 7.0])]
    y, u = two_input_test(truth)
    n = y.size
    fit = fit_output(
        y,
        u,
        [PairSpec(0, FO), PairSpec(1, FO)],
        sample_time=1.0,
        used=np.ones(n, dtype=bool),
        max_dead_time=30.0,
        settling_samples=60,
    )
    for got, want in zip(fit.parameters, truth, strict=True):
        assert got[0] == pytest.approx(want[0], rel=0.02)  # gain within 2 %
        assert got[1] == pytest.approx(want[1], rel=0.05)  # time constant within 5 %
        assert abs(got[2] - want[2]) < 0.5  # dead time within half a sample
    assert fit.offset == pytest.approx(120.0, abs=3 * fit.offset_error + 1e-3)
    # The reported standard errors are about the scatter: the truth lies within 4 of them.
    for got, se, want in zip(fit.parameters, fit.standard_errors, truth, strict=True):
        assert np.all(np.abs(got - want) < 4 * se)


@pytest.mark.parametrize("output_factor", [1e-9, 1.0, 1e9])
@pytest.mark.parametrize("input_factor", [1e-12, 1e4, 1e12])
def test_the_fit_is_the_same_in_any_units(output_factor, input_factor) -> None:
    # The same invented plant test written in other units (the output as a fraction or in ppb,
    # the second input in kg/h or as a fraction): a linear model's gain scales by
    # output_factor / input_factor and its time constants and dead times do not change
    # (dimensional analysis, common practice), nor does the fit's quality; the standard errors
    # scale as their parameters.  Before the data were scaled inside, small output units
    # stopped the solver early and tiny input units lost the gain's standard error.
    # dead times off the sample grid: the fit's sensitivity to a dead time changes at whole samples
    y, u = two_input_test([np.array([2.5, 10.0, 3.4]), np.array([-0.4, 6.0, 6.6])])
    n = y.size

    def fit(y_data, u_data):
        return fit_output(
            y_data,
            u_data,
            [PairSpec(0, FO), PairSpec(1, FO)],
            sample_time=1.0,
            used=np.ones(n, dtype=bool),
            max_dead_time=30.0,
            settling_samples=60,
        )

    base = fit(y, u)
    other = fit(output_factor * y, u * np.array([1.0, input_factor]))
    for k, (got, se, want, want_se) in enumerate(
        zip(other.parameters, other.standard_errors, base.parameters, base.standard_errors, strict=True)
    ):
        gain = output_factor / (input_factor if k == 1 else 1.0)
        np.testing.assert_allclose(got, want * np.array([gain, 1.0, 1.0]), rtol=1e-6)
        np.testing.assert_allclose(se, want_se * np.array([abs(gain), 1.0, 1.0]), rtol=1e-4)
    assert other.residual_std == pytest.approx(output_factor * base.residual_std, rel=1e-6)
    assert other.offset == pytest.approx(output_factor * base.offset, rel=1e-9)


def test_least_squares_agrees_with_curve_fit_on_the_same_residual() -> None:
    # Independent general-purpose fit: scipy.optimize.curve_fit on the same model function,
    # started where ours started (its covariance is the same first-order formula, computed by scipy).
    rng = np.random.default_rng(5)
    n = 500
    u = binary_signal(rng, n, 10)[:, None]
    y = 10.0 + pair_response(FO, np.array([1.5, 8.0, 2.3]), u[:, 0], sample_time=1.0)
    y = y + rng.normal(scale=0.05, size=n)
    pairs = [PairSpec(0, FO)]
    fit = fit_output(y, u, pairs, sample_time=1.0, used=np.ones(n, dtype=bool), max_dead_time=20, settling_samples=50)
    ours = np.concatenate((fit.parameters[0], [fit.offset]))

    def model(_: np.ndarray, *x: float) -> np.ndarray:
        return model_output(np.array(x), u, pairs, sample_time=1.0)

    p0 = ours * np.array([1.1, 0.9, 1.0, 1.0])
    reference, cov = scipy.optimize.curve_fit(
        model, np.arange(n), y, p0=p0, bounds=([-np.inf, 0.01, 0.0, -np.inf], [np.inf, 5000, 20, np.inf])
    )
    np.testing.assert_allclose(ours, reference, rtol=2e-3)
    ours_se = np.concatenate((fit.standard_errors[0], [fit.offset_error]))
    np.testing.assert_allclose(ours_se, np.sqrt(np.diag(cov)), rtol=0.05)


def test_integrating_level_recovered() -> None:
    rng = np.random.default_rng(8)
    n = 600
    u = binary_signal(rng, n, 6)[:, None] * 2.0
    y = 50.0 + pair_response(INT, np.array([-0.05, 2.6]), u[:, 0], sample_time=1.0) + rng.normal(scale=0.01, size=n)
    fit = fit_output(
        y,
        u,
        [PairSpec(0, INT)],
        sample_time=1.0,
        used=np.ones(n, dtype=bool),
        max_dead_time=20,
        settling_samples=30,
        integrating=True,
    )
    assert fit.parameters[0][0] == pytest.approx(-0.05, rel=0.02)
    assert abs(fit.parameters[0][1] - 2.6) < 0.5


def test_wood_berry_column_recovered_from_a_simulated_test() -> None:
    # Wood and Berry distillation column (Wood & Berry 1973, Chem. Eng. Sci. 28:1707), values
    # recalled from memory as in tests/solver/test_transfer.py; minutes, sampled every minute.
    wood_berry = [[(12.8, 16.7, 1.0), (-18.9, 21.0, 3.0)], [(6.6, 10.9, 7.0), (-19.4, 14.4, 3.0)]]
    rng = np.random.default_rng(1973)
    n = 1000
    u = np.column_stack([0.1 * binary_signal(rng, n, 25), 0.1 * binary_signal(rng, n, 25)])
    for row in wood_berry:
        clean = sum(pair_response(FO, np.array(p), u[:, j], sample_time=1.0) for j, p in enumerate(row))
        y = clean + rng.normal(scale=0.05 * np.std(clean), size=n)
        fit = fit_output(
            y,
            u,
            [PairSpec(0, FO), PairSpec(1, FO)],
            sample_time=1.0,
            used=np.ones(n, dtype=bool),
            max_dead_time=30,
            settling_samples=80,
        )
        for got, (k, tau, theta) in zip(fit.parameters, row, strict=True):
            assert got[0] == pytest.approx(k, rel=0.02)
            assert got[1] == pytest.approx(tau, rel=0.05)
            assert abs(got[2] - theta) < 0.5
        measured = fit_measures(y, fit.fitted, np.ones(n, dtype=bool))
        assert measured[1] > 0.99


def test_second_order_fit_reproduces_the_step_response() -> None:
    # Two lags trade off against the dead time, so the check is the step response (the use of
    # the model), within 2 % of the gain at every sample.
    rng = np.random.default_rng(2)
    n = 800
    u = binary_signal(rng, n, 15)[:, None]
    truth = np.array([1.2, 9.0, 4.0, 2.5])
    y = pair_response(SO, truth, u[:, 0], sample_time=1.0) + rng.normal(scale=0.02, size=n)
    fit = fit_output(
        y, u, [PairSpec(0, SO)], sample_time=1.0, used=np.ones(n, bool), max_dead_time=20, settling_samples=60
    )
    steps = np.ones(80)
    np.testing.assert_allclose(
        pair_response(SO, fit.parameters[0], steps, sample_time=1.0),
        pair_response(SO, truth, steps, sample_time=1.0),
        atol=0.02 * 1.2,
    )


def lsim_second_order_dead_time(
    truth: tuple[float, float, float, float], u: np.ndarray, *, fine: int = 20
) -> np.ndarray:
    """Reference: ``K e^(-theta s)/((tau1 s + 1)(tau2 s + 1))`` at the samples (sample time 1), simulated
    by scipy.signal.lsim on the continuous transfer function, independently of the service.

    The held input is delayed by ``theta`` on a grid ``fine`` times finer than the samples (the
    dead times used are whole multiples of its step) and run with ``interp=False``, which holds
    the input between grid points: exact for a held input delayed by a multiple of the grid step.
    """
    gain, tau1, tau2, theta = truth
    system = scipy.signal.lti([gain], np.polymul([tau1, 1.0], [tau2, 1.0]))
    dt = 1.0 / fine
    t = dt * np.arange(u.size * fine)
    sample = np.floor(np.round((t - theta) / dt, 9) / fine).astype(int)
    held = np.where(sample >= 0, u[np.clip(sample, 0, None)], 0.0)
    _, y, _ = scipy.signal.lsim(system, held, t, interp=False)
    return y[::fine]


#: Second-order-plus-dead-time plants (gain, both time constants, dead time; invented): well
#: separated lags with a fractional dead time, and a negative gain with lags closer together.
SECOND_ORDER_PLANTS = [(1.2, 9.0, 4.0, 2.5), (-0.7, 6.0, 2.5, 4.35)]


def _second_order_fit(truth: tuple[float, float, float, float], seed: int, noise: float):
    rng = np.random.default_rng(seed)
    n = 800
    u = binary_signal(rng, n, 15)
    y = 5.0 + lsim_second_order_dead_time(truth, u)
    if noise:
        y = y + rng.normal(scale=noise, size=n)
    fit = fit_output(
        y, u[:, None], [PairSpec(0, SO)], sample_time=1.0, used=np.ones(n, bool), max_dead_time=20, settling_samples=60
    )
    order = [0, *sorted((1, 2), key=lambda i: -fit.parameters[0][i]), 3]  # longer time constant first
    return fit.parameters[0][order], fit.standard_errors[0][order]


@pytest.mark.parametrize("truth", SECOND_ORDER_PLANTS)
def test_second_order_fit_recovers_every_parameter_of_noise_free_data(truth) -> None:
    # Noise-free data from the plant simulated by scipy.signal.lsim: the least-squares optimum is the
    # truth itself, so every parameter comes back to the optimizer's tolerance. Stated tolerance:
    # 1e-6 relative for the gain and both time constants, 1e-6 samples for the dead time.
    got, _ = _second_order_fit(truth, seed=2, noise=0.0)
    gain, tau1, tau2, theta = truth
    assert got[0] == pytest.approx(gain, rel=1e-6)
    assert got[1] == pytest.approx(tau1, rel=1e-6)
    assert got[2] == pytest.approx(tau2, rel=1e-6)
    assert got[3] == pytest.approx(theta, abs=1e-6)


@pytest.mark.parametrize("truth", SECOND_ORDER_PLANTS)
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_second_order_standard_errors_cover_the_truth_with_noise(truth, seed) -> None:
    # The same plant with white noise (standard deviation 2 % of the gain): each true value lies within
    # 3 reported standard errors (a 99.7 % interval of a normal estimate, common practice), and the
    # standard errors are small enough to mean something (each below 5 % of its parameter).
    got, se = _second_order_fit(truth, seed=seed, noise=0.02 * abs(truth[0]))
    want = np.array(truth)
    assert np.all(np.isfinite(se)) and np.all(se > 0)
    assert np.all(np.abs(got - want) <= 3.0 * se), (got, se, (got - want) / se)
    assert np.all(se < 0.05 * np.abs(want))


def test_outliers_found_and_steps_kept() -> None:
    rng = np.random.default_rng(4)
    y = np.concatenate((np.zeros(100), 5.0 * np.ones(100))) + rng.normal(scale=0.1, size=200)
    y[50] += 3.0
    y[150] -= 2.5
    y[120] = np.nan
    found = find_outliers(y, limit=6.0)
    assert set(np.nonzero(found)[0]) == {50, 150}


def test_missing_inputs_held_and_resampling() -> None:
    held, filled = hold_missing(np.array([np.nan, 1.0, np.nan, np.nan, 3.0]))
    np.testing.assert_array_equal(held, [1.0, 1.0, 1.0, 1.0, 3.0])
    assert filled == 3
    time = np.array([0.0, 0.4, 1.7, 2.0, 2.9, 7.0])
    values = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 5.0])
    grid = sample_grid(time, 1.0)
    np.testing.assert_array_equal(grid, np.arange(8.0))
    np.testing.assert_array_equal(resample_held(time, values, grid), [0, 1, 3, 4, 4, 4, 4, 5])
    interpolated = resample_interpolated(time, values, grid, sample_time=1.0)
    np.testing.assert_allclose(interpolated[:3], [0.0, 1.0 + 0.6 / 1.3, 3.0])
    assert np.all(np.isnan(interpolated[3:7]))  # between 2.9 and 7.0: a gap of 4.1 > 2 Ts
    assert interpolated[7] == 5.0


def test_residual_checks_of_white_noise_stay_inside_the_bound() -> None:
    # White residuals independent of the input: about 1 % of lags outside the 99 % bound (Ljung 1999, 16.6).
    rng = np.random.default_rng(9)
    e = rng.normal(size=4000)
    u = rng.normal(size=(4000, 1))
    auto, cross = residual_correlations(e, np.ones(4000, bool), u, lags=20)
    assert auto.bound == pytest.approx(2.576 / np.sqrt(4000))
    assert auto.outside <= 2 and cross[0].outside <= 2
    coloured = scipy.signal.lfilter([1.0], [1.0, -0.8], e)
    auto, _ = residual_correlations(coloured, np.ones(4000, bool), u, lags=20)
    assert auto.values[0] == pytest.approx(0.8, abs=0.05) and auto.outside >= 10


def test_outliers_of_a_test_that_is_mostly_transients() -> None:
    """A running median passes the monotone transients of a step test unchanged (zero deviation):
    those samples say nothing of the noise.  Counted in the scale, more than half the deviations
    were zero, the scale near zero, and half of this clean record was called outliers."""
    rng = np.random.default_rng(7)
    n = 1500
    # an invented reheater's fuel steps: a new level every 40 to 120 s
    u = random_steps(rng, n, first=60, hold=(40, 120), size=(45.0, 150.0))
    # the temperature's response, independent of the service: scipy's zero-order-hold
    # discretization of 0.05/(40 s + 1) and scipy.signal.dlsim, 9 samples of dead time
    a, b, c, d, _ = scipy.signal.cont2discrete(
        (np.array([[-1 / 40.0]]), np.array([[0.05 / 40.0]]), np.eye(1), np.zeros((1, 1))), 1.0, method="zoh"
    )
    _, clean, _ = scipy.signal.dlsim((a, b, c, d, 1.0), np.concatenate((np.zeros(9), u[:-9])))
    noise = 0.05
    y = 420.0 + clean.ravel() + rng.normal(scale=noise, size=n)
    found = find_outliers(y, limit=6.0)
    # Gaussian noise beyond 6 standard deviations: about 2e-9 of the samples (the normal tail),
    # so none is expected; a few may sit where the response turns (its own curvature)
    assert found.sum() <= 3, int(found.sum())
    flat = np.nonzero(np.abs(np.diff(clean.ravel(), prepend=0.0)) < 1e-3 * noise)[0]
    spikes = flat[[50, len(flat) // 2, -50]]
    y[spikes] += 10.0 * noise * np.array([1.0, -1.0, 1.0])
    assert set(np.nonzero(find_outliers(y, limit=6.0))[0]) >= set(spikes.tolist())


@pytest.mark.parametrize("noise", [0.0, 1e-6, 1e-3])
def test_a_quiet_step_test_has_no_outliers_where_it_turns(noise) -> None:
    """Found in an audit of identification: with noise far below the plant's moves per sample,
    a step test's turns (where the response reverses after a dead time) put samples off their
    running median by about a sample's move, and the check called 6 to 27 of them outliers (the
    samples that show the dead time).  A spike on a steep transient is still found."""
    rng = np.random.default_rng(11)
    n = 600
    u = np.zeros(n)
    for start in range(40, n, 70):  # an invented heater's steam steps, reversed every 70 s
        u[start:] = 20.0 if (start // 70) % 2 == 0 else -20.0
    # the response, independent of the service: scipy's zero-order-hold discretization of
    # 0.5/(8 s + 1) and scipy.signal.dlsim, 12 samples of dead time
    a, b, c, d, _ = scipy.signal.cont2discrete(
        (np.array([[-1 / 8.0]]), np.array([[0.5 / 8.0]]), np.eye(1), np.zeros((1, 1))), 1.0, method="zoh"
    )
    _, clean, _ = scipy.signal.dlsim((a, b, c, d, 1.0), np.concatenate((np.zeros(12), u[:-12])))
    y = 80.0 + clean.ravel() + (rng.normal(scale=noise, size=n) if noise else 0.0)
    assert find_outliers(y, limit=6.0).sum() == 0
    steep = int(np.argmax(np.abs(np.diff(clean.ravel()))))  # the fastest move of the response
    moved = y.copy()
    moved[steep] += 8.0 * abs(float(np.diff(clean.ravel())[steep]))
    assert np.nonzero(find_outliers(moved, limit=6.0))[0].tolist() == [steep]


def test_resampling_with_absolute_time_stamps() -> None:
    """Stamps in seconds since 1970 (about 1.78e9), two a second, put on a 1 s sample time.

    The zero-order hold's definition (each instant takes the last value at or before it) and
    linear interpolation, written out here: the instant t0 + k takes the value stamped there.  A
    tolerance of a billionth of the stamps' size (1.8 s) had taken the value stamped 1.5 s later."""
    t0 = 1.7829e9
    time = t0 + 0.5 * np.arange(41)
    values = np.arange(41.0)  # the value stamped t0 + 0.5 i is i
    grid = sample_grid(time, 1.0)
    np.testing.assert_array_equal(grid - t0, np.arange(21.0))
    np.testing.assert_array_equal(resample_held(time, values, grid), 2.0 * np.arange(21.0))
    np.testing.assert_array_equal(resample_interpolated(time, values, grid, sample_time=1.0), 2.0 * np.arange(21.0))
    # between the stamps: the hold takes the earlier one, the interpolation the mean of the two
    between = grid[:-1] + 0.25
    np.testing.assert_array_equal(resample_held(time, values, between), 2.0 * np.arange(20.0))
    np.testing.assert_allclose(
        resample_interpolated(time, values, between, sample_time=1.0), 2.0 * np.arange(20.0) + 0.5
    )


def test_outliers_of_fit_keep_only_what_the_model_does_not_explain() -> None:
    """The residual-based Hampel test written out by hand: the residuals' median and 1.4826 times
    their median absolute deviation over the fitted samples (numpy), a candidate kept when it lies
    farther than the limit from that median."""
    rng = np.random.default_rng(2)
    fitted = np.linspace(0.0, 10.0, 200)
    y = fitted + rng.normal(scale=0.1, size=200)
    candidates = np.array([20, 90, 150])
    y[90] += 3.0  # a spike the model does not explain; 20 and 150 are the plant's own samples
    used = np.ones(200, dtype=bool)
    used[candidates] = False
    r = (y - fitted)[used]
    scale = 1.4826 * np.median(np.abs(r - np.median(r)))
    want = [k for k in candidates if abs(y[k] - fitted[k] - np.median(r)) > 6.0 * scale]
    assert want == [90]
    assert outliers_of_fit(y, fitted, used, candidates, limit=6.0).tolist() == want
    exact = fitted.copy()  # a fit exact to rounding calls none of its samples an outlier
    assert outliers_of_fit(exact + 1e-15, exact, used, candidates, limit=6.0).size == 0


def test_frozen_runs_are_stretches_of_one_value() -> None:
    """Runs of exactly one value of at least the length asked, as half-open ranges; a missing
    sample ends a run (written out by hand)."""
    y = np.array([1.0, 2.0, 2.0, 2.0, 3.0, np.nan, 4.0, 4.0, 4.0, 4.0])
    assert frozen_runs(y, min_length=3) == [(1, 4), (6, 10)]
    assert frozen_runs(y, min_length=4) == [(6, 10)]
    assert frozen_runs(np.full(5, np.nan), min_length=2) == []


def test_lag_blocks_cover_every_lag_once() -> None:
    """Short impulse responses keep one coefficient a lag; long ones share coefficients in blocks
    that cover lags 1 .. length once each, one lag a block up to FIR_SINGLE."""
    np.testing.assert_array_equal(lag_blocks(10), np.arange(1, 12))
    edges = lag_blocks(5000)
    assert edges[0] == 1 and edges[-1] == 5001 and np.all(np.diff(edges) >= 1)
    np.testing.assert_array_equal(edges[: FIR_SINGLE + 1], np.arange(1, FIR_SINGLE + 2))
    assert edges.size - 1 <= FIR_SINGLE + FIR_BLOCKS


def test_a_long_record_of_a_slow_pair_is_fitted_from_blocked_starts() -> None:
    """20 000 samples of a slow pair (0.8/(60 s + 1), 14 s dead time): the starts come from the
    blocked impulse response (a quarter of the record long); the fit recovers the truth (scipy's
    zero-order-hold discretization and scipy.signal.dlsim) within 1 % on the gain and the lag and
    half a sample on the dead time."""
    rng = np.random.default_rng(8)
    n = 20000
    u = random_steps(rng, n, first=50, hold=(150, 400), size=(5.0, 10.0))
    a, b, c, d, _ = scipy.signal.cont2discrete(
        (np.array([[-1 / 60.0]]), np.array([[0.8 / 60.0]]), np.eye(1), np.zeros((1, 1))), 1.0, method="zoh"
    )
    _, clean, _ = scipy.signal.dlsim((a, b, c, d, 1.0), np.concatenate((np.zeros(14), u[:-14])))
    y = 200.0 + clean.ravel() + rng.normal(scale=0.05, size=n)
    fit = fit_output(
        y,
        u[:, None],
        [PairSpec(0, FO)],
        sample_time=1.0,
        used=np.ones(n, dtype=bool),
        max_dead_time=n / 3,
        settling_samples=n // 4,
    )
    gain, tau, theta = fit.parameters[0]
    assert gain == pytest.approx(0.8, rel=0.01) and tau == pytest.approx(60.0, rel=0.01)
    assert abs(theta - 14.0) <= 0.5


def test_moves_correlation_finds_a_shifted_copy() -> None:
    """At lag 0 it is numpy's correlation coefficient; a copy of the moves 15 samples later is found
    at lag 15 with correlation 1 (up to the samples shifted out), and not within a range of 10."""
    rng = np.random.default_rng(6)
    a = rng.normal(size=500) * (rng.random(500) < 0.05)
    b = rng.normal(size=500)
    r, lag = moves_correlation(a, b, max_lag=0)
    assert lag == 0 and r == pytest.approx(np.corrcoef(a, b)[0, 1], abs=1e-12)
    later = np.concatenate((np.zeros(15), 0.3 * a[:-15]))
    r, lag = moves_correlation(a, later, max_lag=20)
    assert lag == 15 and r > 0.95
    assert abs(moves_correlation(a, later, max_lag=10)[0]) < 0.5
