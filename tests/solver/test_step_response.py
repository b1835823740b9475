"""Step-response tables realized exactly, and balanced truncation of the stable part."""

from __future__ import annotations

import control
import numpy as np
import pytest
import scipy.linalg
import scipy.signal
import slycot

from service.solver.models.reduction import balanced_truncation
from service.solver.models.step_response import StepResponse, step_response_model, step_state_count
from service.solver.models.transfer import TransferElement, transfer_matrix_model


def unit_steps(a: np.ndarray, b: np.ndarray, c: np.ndarray, steps: int) -> np.ndarray:
    """Step responses y(1..steps) of every pair from rest, shape (steps, p, m), by scipy.signal.dlsim."""
    p, m = c.shape[0], b.shape[1]
    out = np.zeros((steps, p, m))
    system = (a, b, c, np.zeros((p, m)), 1.0)
    for j in range(m):
        u = np.zeros((steps + 1, m))
        u[:, j] = 1.0
        _, y, _ = scipy.signal.dlsim(system, u)
        out[:, :, j] = y[1:]
    return out


def test_table_reproduced_at_every_sample_self_regulating_and_integrating() -> None:
    # Invented table: a lag with dead time, an inverse response, an absent pair, an integrating
    # level (slope 0.05 per sample after the table) and a one-coefficient integrator.
    rng = np.random.default_rng(3)
    lag = 2.0 * (1.0 - np.exp(-np.arange(1, 31) / 6.0))
    lag[:4] = 0.0
    inverse = np.concatenate((-0.1 * np.arange(1, 6), -0.5 + 0.2 * np.arange(1, 21)))
    level = np.cumsum(np.concatenate((np.zeros(3), 0.05 * (1 - np.exp(-np.arange(1, 13) / 2.0)))))
    table = [
        [StepResponse(lag), StepResponse(inverse), None],
        [StepResponse(level, integrating=True), None, StepResponse(np.array([0.3]), integrating=True)],
        [None, StepResponse(rng.normal(size=7)), StepResponse(np.array([1.5]))],
    ]
    model = step_response_model(table)
    assert model.state_count == step_state_count(table) == 30 + 25 + 1 + 1  # registers per column, one integrator
    steps = 60
    y = unit_steps(model.a, model.b, model.c, steps)
    k = np.arange(1, steps + 1)
    for i, row in enumerate(table):
        for j, el in enumerate(row):
            if el is None:
                np.testing.assert_array_equal(y[:, i, j], 0.0)
                continue
            s = el.coefficients
            n = s.size
            expected = np.where(k <= n, s[np.minimum(k, n) - 1], s[-1])
            if el.integrating:
                expected = expected + el.slope * np.clip(k - n, 0, None)
            # Exact up to the rounding of the sums (the coefficients themselves are O(1)).
            np.testing.assert_allclose(y[:, i, j], expected, rtol=0, atol=1e-12)


def test_disturbance_columns_share_the_row_integrator() -> None:
    level = np.array([0.0, 0.1, 0.3, 0.5])
    inflow = np.array([0.0, 0.0, 0.2, 0.4, 0.6])
    model = step_response_model(
        [[StepResponse(level, integrating=True)]],
        disturbance_elements=[[StepResponse(inflow, integrating=True)]],
    )
    assert model.b_disturbance is not None
    assert sum(role.kind == "output_integrator" for role in model.states) == 1
    y = unit_steps(model.a, model.b_disturbance, model.c, 12)[:, 0, 0]
    expected = np.concatenate((inflow, 0.6 + 0.2 * np.arange(1, 8)))
    np.testing.assert_allclose(y, expected, atol=1e-12)


def test_table_of_a_sampled_transfer_element_gives_the_same_model_response() -> None:
    # The step response of a sampled first-order-plus-dead-time element, tabulated until settled,
    # realized again: both models agree at every sample (the transfer model is the reference).
    element = TransferElement(1.7, (4.0,), 2.5)
    sampled = transfer_matrix_model([[element]], sample_time=1.0)
    reference = unit_steps(sampled.a, sampled.b, sampled.c, 200)[:, 0, 0]
    table = step_response_model([[StepResponse(reference[:120])]])
    again = unit_steps(table.a, table.b, table.c, 200)[:, 0, 0]
    np.testing.assert_allclose(again[:120], reference[:120], atol=1e-12)
    np.testing.assert_allclose(again[120:], reference[119], atol=1e-12)
    np.testing.assert_allclose(reference[-1], 1.7, rtol=1e-10)


def test_balanced_truncation_matches_slicot_and_keeps_its_bound() -> None:
    # Reference: SLICOT AB09AD (discrete, balanced square-root truncation) through slycot.
    element = TransferElement(2.0, (5.0, 2.0), 1.5)
    sampled = transfer_matrix_model([[element]], sample_time=1.0)
    settled = unit_steps(sampled.a, sampled.b, sampled.c, 80)[:, 0, 0]
    model = step_response_model([[StepResponse(settled)]])
    reduced = balanced_truncation(model.a, model.b, model.c, states=4)
    assert reduced.kept == 4 and reduced.unstable == 0
    n = model.state_count
    kept, ar, br, cr, hsv = slycot.ab09ad("D", "B", "N", n, 1, 1, model.a, model.b, model.c, nr=4, tol=0.0)
    assert kept == 4
    np.testing.assert_allclose(
        np.sort_complex(np.linalg.eigvals(reduced.a)), np.sort_complex(np.linalg.eigvals(ar)), rtol=0, atol=1e-6
    )
    np.testing.assert_allclose(reduced.hankel_singular_values[:4], hsv[:4], rtol=1e-8)
    np.testing.assert_allclose(reduced.hankel_singular_values[:20], hsv[:20], rtol=0, atol=1e-9)
    # The reduced model recovers the element's two lag poles e^(-1/5), e^(-1/2) (sampled exactly).
    real = np.sort(np.linalg.eigvals(reduced.a).real)
    np.testing.assert_allclose(real[-2:], [np.exp(-1 / 2), np.exp(-1 / 5)], rtol=1e-4)
    # The bound (Al-Saggaf & Franklin 1987) holds on a dense frequency grid.
    full = control.ss(model.a, model.b, model.c, 0.0, 1.0)
    ours = control.ss(reduced.a, reduced.b, reduced.c, 0.0, 1.0)
    w = np.linspace(0.0, np.pi, 400)
    z = np.exp(1j * w)
    gap = np.abs(full(z) - ours(z)).ravel()
    assert gap.max() <= reduced.error_bound * (1 + 1e-9)
    slicot = control.ss(ar, br, cr, 0.0, 1.0)
    np.testing.assert_allclose(ours(z).ravel(), slicot(z).ravel(), rtol=1e-7, atol=1e-9)
    # The tail of tiny singular values (below 1e-6) carries rounding of about 1 % in both.
    assert reduced.error_bound == pytest.approx(2.0 * hsv[4:].sum(), rel=1e-2)


def test_truncation_keeps_the_integrator_whole() -> None:
    level = np.cumsum(np.concatenate((np.zeros(2), 0.1 * (1 - np.exp(-np.arange(1, 25) / 3.0)))))
    model = step_response_model([[StepResponse(level, integrating=True)]])
    reduced = balanced_truncation(model.a, model.b, model.c, tolerance=1e-3)
    assert reduced.unstable == 1
    assert reduced.kept < model.state_count - 1
    assert reduced.error_bound <= 1e-3
    assert np.sum(np.isclose(np.linalg.eigvals(reduced.a), 1.0, atol=1e-9)) == 1
    # The slope after the table is the integrator's and is kept exactly (its residue is untouched).
    y_full = unit_steps(model.a, model.b, model.c, 200)[:, 0, 0]
    y_red = unit_steps(reduced.a, reduced.b, reduced.c, 200)[:, 0, 0]
    assert np.diff(y_red)[-10:] == pytest.approx(np.diff(y_full)[-10:], rel=1e-8)
    # A lower-triangular similarity check: the decoupled blocks (Golub & Van Loan 7.6.3).
    assert scipy.linalg.norm(reduced.a[: reduced.kept, reduced.kept :]) == 0.0
