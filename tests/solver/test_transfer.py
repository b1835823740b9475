"""Transfer matrices with dead time converted to exact discrete state-space models."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from service.errors import NumericalError
from service.solver.models.transfer import (
    STIFFNESS_LIMIT,
    SampledTransferModel,
    TransferElement,
    delay_samples,
    stiffness_ratio,
    transfer_matrix_model,
    transfer_state_count,
)

E = TransferElement

# Wood and Berry distillation column (Wood & Berry 1973, Chem. Eng. Sci. 28:1707), times in
# minutes: reflux and steam flow to top and bottom composition.
WOOD_BERRY = [
    [E(12.8, (16.7,), 1.0), E(-18.9, (21.0,), 3.0)],
    [E(6.6, (10.9,), 7.0), E(-19.4, (14.4,), 3.0)],
]


def analytic_step(el: TransferElement, t: np.ndarray) -> np.ndarray:
    """Continuous unit-step response of ``el`` at times ``t`` (right-continuous at the delay).

    Source: inverse Laplace transforms of ``g(s)/s`` by partial fractions, standard table
    pairs (e.g. ``1/(s(tau s+1)) -> 1 - e^(-t/tau)``, ``1/(s(tau s+1)^2) -> 1 - (1 + t/tau)
    e^(-t/tau)``, ``1/s^2 -> t``); a lead ``L s + 1`` adds ``L`` times the derivative.
    """
    k, lead = el.gain, el.lead or 0.0
    tau = el.time_constants
    s = np.clip(t - el.dead_time, 0.0, None)
    if not el.integrating:
        if not tau:
            y = np.ones_like(s)
        elif len(tau) == 1:
            y = 1.0 - (1.0 - lead / tau[0]) * np.exp(-s / tau[0])
        elif tau[0] == tau[1]:
            t1 = tau[0]
            y = 1.0 - (1.0 + s / t1 - lead * s / t1**2) * np.exp(-s / t1)
        else:
            t1, t2 = tau
            y = 1.0 - (t1 - lead) / (t1 - t2) * np.exp(-s / t1) + (t2 - lead) / (t1 - t2) * np.exp(-s / t2)
    else:
        if not tau:
            y = s + lead
        elif len(tau) == 1:
            y = s + (lead - tau[0]) * (1.0 - np.exp(-s / tau[0]))
        else:
            t1, t2 = tau
            e1, e2 = np.exp(-s / t1), np.exp(-s / t2)
            y = s - (t1 + t2) + (t1**2 * e1 - t2**2 * e2) / (t1 - t2)
            y = y + lead * (1.0 - (t1 * e1 - t2 * e2) / (t1 - t2))
    return np.where(t >= el.dead_time, k * y, 0.0)


def simulate_step(model: SampledTransferModel, column: int, steps: int, *, disturbance: bool = False) -> np.ndarray:
    """Outputs y(0..steps) after a unit step at k = 0 in one input column, from rest."""
    b = model.b_disturbance if disturbance else model.b
    d = model.d_disturbance if disturbance else model.d
    x = np.zeros(model.state_count)
    out = []
    for _ in range(steps + 1):
        out.append(model.c @ x + d[:, column])
        x = model.a @ x + b[:, column]
    return np.array(out)


ELEMENTS = [
    pytest.param(E(2.0, (3.0,), 1.3), 0.5, id="first-order"),
    pytest.param(E(-1.5, (3.0,), 0.0, lead=1.2), 0.4, id="first-order-lead-no-delay"),
    pytest.param(E(0.8, (2.0,), 2.35, lead=5.0), 0.5, id="first-order-lead"),
    pytest.param(E(1.0, (4.0, 1.5), 2.2), 0.7, id="second-order-distinct"),
    pytest.param(E(1.7, (4.0, 1.5), 0.9, lead=-2.0), 0.7, id="second-order-inverse-response"),
    pytest.param(E(3.0, (2.5, 2.5), 1.1), 0.6, id="second-order-equal"),
    pytest.param(E(3.0, (2.5, 2.5), 1.1, lead=0.8), 0.6, id="second-order-equal-lead"),
    pytest.param(E(0.25, (), 1.9, integrating=True), 0.5, id="integrating"),
    pytest.param(E(0.25, (), 0.0, integrating=True, lead=3.0), 0.5, id="integrating-lead"),
    pytest.param(E(0.4, (5.0,), 3.3, integrating=True), 1.0, id="integrating-first-order"),
    pytest.param(E(0.4, (5.0, 2.0), 0.35, integrating=True, lead=1.0), 1.0, id="integrating-second-order"),
    pytest.param(E(-2.0, (), 0.3), 1.0, id="pure-gain-fractional-delay"),
    pytest.param(E(-2.0, (), 2.0), 1.0, id="pure-gain-whole-delay"),
]


@pytest.mark.parametrize(("element", "ts"), ELEMENTS)
def test_sampled_step_equals_analytic_step_at_the_sample_instants(element: TransferElement, ts: float) -> None:
    # Exactness under zero-order hold: a step is held exactly, so y(k) = y_c(k Ts).
    model = transfer_matrix_model([[element]], sample_time=ts)
    steps = 60
    y = simulate_step(model, 0, steps)[:, 0]
    expected = analytic_step(element, ts * np.arange(steps + 1))
    np.testing.assert_allclose(y, expected, rtol=1e-10, atol=1e-11 * abs(element.gain) * steps)
    # the element's order plus one state per whole or started sample of dead time (an
    # integrating element's integrator is its row's shared one: still one state here)
    whole, fraction = delay_samples(element.dead_time, ts)
    assert model.state_count == element.order + whole + (fraction > 0)


def test_first_order_element_has_the_handbook_pole_and_gain() -> None:
    # Handbook formula: K/(tau s + 1) under zero-order hold has the pole e^(-Ts/tau) and
    # y(k+1) = e^(-Ts/tau) y(k) + K (1 - e^(-Ts/tau)) u(k).
    k, tau, ts = 2.5, 4.0, 0.7
    model = transfer_matrix_model([[E(k, (tau,))]], sample_time=ts)
    assert model.state_count == 1
    assert model.a[0, 0] == pytest.approx(math.exp(-ts / tau), rel=1e-14)
    assert (model.c @ model.b)[0, 0] == pytest.approx(k * (1.0 - math.exp(-ts / tau)), rel=1e-13)
    assert model.strictly_proper


def test_delayed_first_order_matches_the_modified_z_transform() -> None:
    # Modified z-transform of K e^(-theta s)/(tau s + 1), theta = (d + f) Ts (standard table
    # result, recalled from memory and re-derived in service.solver.models.transfer):
    #   G(z) = K z^(-d-1) (b0 z + b1) / (z - a),  a = e^(-Ts/tau),
    #   b0 = 1 - e^(-(1-f) Ts/tau),  b1 = e^(-(1-f) Ts/tau) - e^(-Ts/tau).
    # Reference simulation: scipy.signal.dimpulse of that transfer function.
    k, tau, ts, d, f = 1.8, 3.0, 0.5, 3, 0.4
    model = transfer_matrix_model([[E(k, (tau,), (d + f) * ts)]], sample_time=ts)
    a = math.exp(-ts / tau)
    b0 = 1.0 - math.exp(-(1.0 - f) * ts / tau)
    b1 = math.exp(-(1.0 - f) * ts / tau) - a
    den = np.concatenate([[1.0, -a], np.zeros(d + 1)])
    steps = 30
    _, (reference,) = scipy.signal.dimpulse(([k * b0, k * b1], den, ts), n=steps + 1)
    ours = np.diff(simulate_step(model, 0, steps)[:, 0], prepend=0.0)
    np.testing.assert_allclose(ours, reference[:, 0], rtol=1e-11, atol=1e-13)
    assert sorted(np.abs(np.linalg.eigvals(model.a)))[-1] == pytest.approx(a, rel=1e-13)


@pytest.mark.parametrize("ts", [1.0, 0.7])
def test_wood_berry_step_responses_are_exact_with_whole_and_fractional_delays(ts: float) -> None:
    model = transfer_matrix_model(WOOD_BERRY, sample_time=ts)
    steps = int(80 / ts)
    times = ts * np.arange(steps + 1)
    for j in range(2):
        y = simulate_step(model, j, steps)
        for i in range(2):
            np.testing.assert_allclose(y[:, i], analytic_step(WOOD_BERRY[i][j], times), rtol=1e-10, atol=1e-9)
    assert model.strictly_proper and model.b_disturbance is None and model.d_disturbance is None


def test_wood_berry_state_count_by_hand() -> None:
    # At Ts = 1 min the delays are 1, 3, 7, 3 samples.  The delays 3 (y1, u2) and 7 (y2, u1)
    # sit on different rows and columns, so no sharing serves both with fewer than 10 delay
    # states; one register per input (7 for u1, 3 for u2) reaches that.  Four lags.
    assert transfer_state_count(WOOD_BERRY, sample_time=1.0) == 4 + 10
    model = transfer_matrix_model(WOOD_BERRY, sample_time=1.0)
    assert model.state_count == 14
    assert model.input_delays == (7, 3) and model.output_delays == (0, 0)
    # unshared, every element would carry its own delay: 4 + (1 + 3 + 7 + 3) = 18 states


def test_shared_input_register_reduces_states() -> None:
    # One input into three first-order outputs with dead times 2, 3, 5 samples: one register
    # of 5 cells serves all three (3 + 5 = 8 states).  Delaying the input by the shortest
    # delay (2) and each element by the rest (0, 1, 3) would take 3 + 2 + 4 = 9; no sharing
    # 3 + 10 = 13.
    col = [[E(1.0, (2.0,), 2.0)], [E(2.0, (3.0,), 3.0)], [E(3.0, (4.0,), 5.0)]]
    model = transfer_matrix_model(col, sample_time=1.0)
    assert model.state_count == transfer_state_count(col, sample_time=1.0) == 8
    assert model.input_delays == (5,) and model.output_delays == (0, 0, 0)


def test_shared_output_delay_reduces_states() -> None:
    # An analyser dead time common to a whole row (4 samples on all three inputs) is one
    # 4-cell register at the output: 2 lags + 4 = 6 states instead of 2 + 3 * 4 = 14.
    row = [[E(1.0, (2.0,), 4.0), E(2.0, (3.0,), 4.0), E(1.5, (), 4.0)]]
    model = transfer_matrix_model(row, sample_time=1.0)
    assert model.state_count == transfer_state_count(row, sample_time=1.0) == 6
    assert model.output_delays == (4,) and model.input_delays == (0, 0, 0)
    kinds = [s.kind for s in model.states]
    assert kinds == ["element", "element"] + ["output_delay"] * 4
    for j in range(3):
        np.testing.assert_allclose(
            simulate_step(model, j, 30)[:, 0], analytic_step(row[0][j], np.arange(31.0)), rtol=1e-12, atol=1e-12
        )


def test_fractional_delay_costs_one_state() -> None:
    # theta = 2.5 Ts: two whole samples plus one extra state for the fraction.
    assert transfer_state_count([[E(1.0, (3.0,), 2.5)]], sample_time=1.0) == 1 + 3
    assert transfer_state_count([[E(1.0, (3.0,), 2.0)]], sample_time=1.0) == 1 + 2


def test_whole_dead_time_not_exact_in_binary_is_snapped() -> None:
    # 2.1 / 0.7 = 3.0000000000000004 in floating point; it is three whole samples.
    assert delay_samples(2.1, 0.7) == (3, 0.0)
    whole, fraction = delay_samples(2.45, 0.7)
    assert whole == 3 and fraction == pytest.approx(0.5, abs=1e-12)


def test_feed_through_only_where_the_element_has_it() -> None:
    # K (L s + 1)/(tau s + 1) jumps by K L / tau at once (initial value theorem); a pure gain
    # without dead time passes straight through.
    model = transfer_matrix_model([[E(2.0, (4.0,), 0.0, lead=1.0), E(3.0)]], sample_time=0.5)
    np.testing.assert_allclose(model.d, [[2.0 * 1.0 / 4.0, 3.0]], rtol=1e-15)
    assert not model.strictly_proper
    delayed = transfer_matrix_model([[E(2.0, (4.0,), 0.2, lead=1.0), E(3.0, (), 0.5)]], sample_time=0.5)
    assert delayed.strictly_proper


def delay_count(el: TransferElement, ts: float) -> int:
    """Whole samples of dead time, plus one for a started sample."""
    whole, fraction = delay_samples(el.dead_time, ts)
    return whole + (fraction > 0)


def _random_grid(rng: np.random.Generator, p: int, m: int, ts: float) -> list[list[TransferElement | None]]:
    grid: list[list[TransferElement | None]] = []
    for _ in range(p):
        row: list[TransferElement | None] = []
        for _ in range(m):
            if rng.uniform() < 0.25:
                row.append(None)
                continue
            order = int(rng.integers(0, 3))
            taus = tuple(float(t) for t in rng.uniform(0.5, 6.0, size=order))
            integrating = order < 2 and rng.uniform() < 0.2
            lead = float(rng.uniform(-2.0, 3.0)) if (order or integrating) and rng.uniform() < 0.3 else None
            dead = float(rng.choice([0.0, rng.uniform(0.0, 6.0), ts * int(rng.integers(0, 8))]))
            row.append(E(float(rng.uniform(-3, 3)), taus, dead, lead=lead, integrating=integrating))
        grid.append(row)
    return grid


@pytest.mark.parametrize("seed", range(8))
def test_random_grids_with_disturbances_are_exact_and_never_cost_more_than_column_sharing(seed: int) -> None:
    rng = np.random.default_rng(seed)
    p, m, md = int(rng.integers(1, 4)), int(rng.integers(1, 4)), int(rng.integers(1, 3))
    ts = float(rng.uniform(0.3, 1.5))
    grid, dist = _random_grid(rng, p, m, ts), _random_grid(rng, p, md, ts)
    model = transfer_matrix_model(grid, sample_time=ts, disturbance_elements=dist)
    assert model.state_count == transfer_state_count(grid, sample_time=ts, disturbance_elements=dist)
    assert len(model.states) == model.state_count
    assert model.b.shape == (model.state_count, m) and model.b_disturbance.shape == (model.state_count, md)
    steps = 25
    times = ts * np.arange(steps + 1)
    for disturbance, elements in ((False, grid), (True, dist)):
        for j in range(len(elements[0])):
            y = simulate_step(model, j, steps, disturbance=disturbance)
            for i in range(p):
                el = elements[i][j]
                expected = np.zeros(steps + 1) if el is None else analytic_step(el, times)
                np.testing.assert_allclose(y[:, i], expected, rtol=1e-9, atol=1e-9)
    # The scheme "delay each column by its shortest delay, each element by the rest" as an
    # upper bound on the delay states.
    orders = sum(el.order for g in (grid, dist) for row in g for el in row if el is not None)
    bound = 0
    for g in (grid, dist):
        for j in range(len(g[0])):
            h = [delay_count(el, ts) for el in (row[j] for row in g) if el is not None]
            if h:
                bound += min(h) + sum(x - min(h) for x in h)
    assert model.state_count <= orders + bound


def test_state_roles_describe_each_state() -> None:
    # One output, a manipulated input delayed 2 samples and a disturbance delayed 1: moving
    # the common sample to the output leaves u1 one register cell, 2 lags + 1 + 1 = 4 states
    # (one register per column would take 2 + 2 + 1 = 5).
    model = transfer_matrix_model(
        [[E(1.0, (2.0, 1.0), 2.0)]], sample_time=1.0, disturbance_elements=[[E(1.0, (), 1.0)]]
    )
    assert [s.describe() for s in model.states] == [
        "state 1 of element (y1, u1)",
        "state 2 of element (y1, u1)",
        "u1 1 sample ago",
        "response of y1 1 sample ago",
    ]
    assert model.input_delays == (1, 0) and model.output_delays == (1,)
    np.testing.assert_allclose(simulate_step(model, 0, 3, disturbance=True)[:, 0], [0, 1, 1, 1], atol=1e-15)


@pytest.mark.parametrize("ratio", [1e2, 1e5, 1e8])
def test_fast_lags_within_the_stiffness_limit_sample_accurately(ratio: float) -> None:
    # First-order plus a fast lag and lead; compared with the analytic step (table pairs).
    el = E(1.5, (1.0 / ratio, 2.0), 0.5, lead=0.7)
    model = transfer_matrix_model([[el]], sample_time=1.0)
    np.testing.assert_allclose(simulate_step(model, 0, 20)[:, 0], analytic_step(el, np.arange(21.0)), rtol=0, atol=1e-7)


def test_lag_too_fast_for_the_sample_time_is_a_numerical_error_naming_the_element() -> None:
    el = E(1.0, (1e-12,), 0.5)
    assert stiffness_ratio(el, 1.0) > STIFFNESS_LIMIT
    with pytest.raises(NumericalError) as caught:
        transfer_matrix_model([[E(1.0, (1.0,))]], sample_time=1.0, disturbance_elements=[[None, el]])
    assert caught.value.field == ("model", "disturbance_elements", 0, 1)


# Two levels.  y1 integrates u1 (0.5/s, dead time 0.4 Ts: a started sample), u2 through a
# lag (-0.3/(s (2s + 1))) and the measured disturbance d1 (0.2/s, dead time 1.5 Ts), and d2
# adds a settling lag 1/(3s + 1); y2 integrates u1 (0.1/s) and d2 (0.7/s, dead time 0.2 Ts).
LEVELS = [
    [E(0.5, (), 0.4, integrating=True), E(-0.3, (2.0,), 0.0, integrating=True)],
    [E(0.1, (), 0.0, integrating=True), None],
]
LEVEL_INFLOWS = [
    [E(0.2, (), 1.5, integrating=True), E(1.0, (3.0,), 0.0)],
    [None, E(0.7, (), 0.2, integrating=True)],
]


def test_integrating_elements_of_a_row_share_one_integrator_and_stay_exact() -> None:
    ts = 1.0
    model = transfer_matrix_model(LEVELS, sample_time=ts, disturbance_elements=LEVEL_INFLOWS)
    # By hand: whole or started delay samples 1, 0, 2, 0 on row 1 and 0, 1 on row 2.  Both
    # rows have a delay-free element, so nothing moves to the outputs; the registers are
    # u1: 1, u2: 0, d1: 2, d2: 1 = 4 cells.  Two lags, one integrator per row: 4 + 2 + 2 = 8
    # states (an integrator per integrating element would take 4 + 2 + 5 = 11).
    assert model.state_count == transfer_state_count(LEVELS, sample_time=ts, disturbance_elements=LEVEL_INFLOWS) == 8
    assert model.input_delays == (1, 0, 2, 1) and model.output_delays == (0, 0)
    integrators = [s for s in model.states if s.kind == "output_integrator"]
    assert [s.describe() for s in integrators] == ["integrator of y1", "integrator of y2"]
    # Exactness at the sample instants, every column against the table step responses.
    steps = 30
    times = ts * np.arange(steps + 1)
    for disturbance, grid in ((False, LEVELS), (True, LEVEL_INFLOWS)):
        for j in range(2):
            y = simulate_step(model, j, steps, disturbance=disturbance)
            for i in range(2):
                el = grid[i][j]
                expected = np.zeros(steps + 1) if el is None else analytic_step(el, times)
                np.testing.assert_allclose(y[:, i], expected, rtol=1e-11, atol=1e-12)
    # Two modes at z = 1 (one per level), both reachable from the manipulated inputs:
    # PBH test, rank [A - I, B] = n (the ramp rates [[0.5, -0.3], [0.1, 0]] are independent).
    eigenvalues = np.linalg.eigvals(model.a)
    assert np.sum(np.abs(eigenvalues - 1.0) < 1e-9) == 2
    n = model.state_count
    assert np.linalg.matrix_rank(np.hstack([model.a - np.eye(n), model.b])) == n


def test_row_integrator_behind_an_output_delay() -> None:
    # A common analyser dead time of 3 samples on both integrating elements of one row (and
    # 3.5 on a disturbance): the 3 samples move to the output, after the shared integrator.
    # By hand: 1 integrator + 3 output cells + 1 cell for the disturbance's started sample.
    row = [[E(0.4, (), 3.0, integrating=True), E(-0.2, (1.5,), 3.0, integrating=True)]]
    dist = [[E(0.3, (), 3.5, integrating=True)]]
    model = transfer_matrix_model(row, sample_time=1.0, disturbance_elements=dist)
    count = transfer_state_count(row, sample_time=1.0, disturbance_elements=dist)
    assert model.state_count == count == 1 + 1 + 3 + 1
    assert model.output_delays == (3,) and model.input_delays == (0, 0, 1)
    for disturbance, grid in ((False, row), (True, dist)):
        for j, el in enumerate(grid[0]):
            np.testing.assert_allclose(
                simulate_step(model, j, 25, disturbance=disturbance)[:, 0],
                analytic_step(el, np.arange(26.0)),
                rtol=1e-11,
                atol=1e-12,
            )
