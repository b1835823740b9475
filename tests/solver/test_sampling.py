"""Zero-order-hold sampling of continuous state-space models."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from service.errors import NumericalError
from service.solver.models.sampling import hold_integrals, sample_zero_order_hold


@pytest.mark.parametrize("seed", range(6))
def test_sampling_equals_scipy_cont2discrete_on_random_systems(seed: int) -> None:
    # Reference library: scipy.signal.cont2discrete with method "zoh".
    rng = np.random.default_rng(seed)
    n, m, md, p = 1 + seed % 4, 1 + seed % 3, 1 + (seed + 1) % 2, 2
    a = rng.normal(size=(n, n))
    b = rng.normal(size=(n, m))
    bd = rng.normal(size=(n, md))
    c = rng.normal(size=(p, n))
    ts = float(rng.uniform(0.05, 2.0))
    ours = sample_zero_order_hold(a, b, sample_time=ts, b_disturbance=bd)
    ad, bdd, _, _, _ = scipy.signal.cont2discrete((a, np.hstack([b, bd]), c, np.zeros((p, m + md))), ts, method="zoh")
    np.testing.assert_allclose(ours.a, ad, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ours.b, bdd[:, :m], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ours.b_disturbance, bdd[:, m:], rtol=1e-12, atol=1e-12)
    assert ours.sample_time == ts


def test_first_order_lag_has_the_handbook_pole_and_gain() -> None:
    # Handbook formula: tau dy/dt = -y + K u under zero-order hold samples to
    # y(k+1) = e^(-Ts/tau) y(k) + K (1 - e^(-Ts/tau)) u(k).
    tau, gain, ts = 4.0, 2.5, 0.7
    s = sample_zero_order_hold([[-1.0 / tau]], [[gain / tau]], sample_time=ts)
    assert s.a[0, 0] == pytest.approx(np.exp(-ts / tau), rel=1e-14)
    assert s.b[0, 0] == pytest.approx(gain * (1.0 - np.exp(-ts / tau)), rel=1e-13)
    assert s.b_disturbance is None


def test_integrator_samples_to_a_ramp_per_sample() -> None:
    # Exact integration of dx/dt = u over Ts with u held: x(k+1) = x(k) + Ts u(k); the
    # double integrator adds Ts^2/2 (elementary calculus).
    ts = 0.3
    s = sample_zero_order_hold([[0.0, 1.0], [0.0, 0.0]], [[0.0], [1.0]], sample_time=ts)
    np.testing.assert_allclose(s.a, [[1.0, ts], [0.0, 1.0]], rtol=0, atol=1e-15)
    np.testing.assert_allclose(s.b, [[ts**2 / 2], [ts]], rtol=1e-14)


def test_partial_interval_integrals_compose_to_one_sample() -> None:
    # Semigroup property of the exponential: holding over t1 then t2 equals t1 + t2.
    rng = np.random.default_rng(7)
    a, b = rng.normal(size=(3, 3)), rng.normal(size=(3, 2))
    phi1, gam1 = hold_integrals(a, b, 0.3)
    phi2, gam2 = hold_integrals(a, b, 0.5)
    phi, gam = hold_integrals(a, b, 0.8)
    np.testing.assert_allclose(phi2 @ phi1, phi, rtol=1e-12)
    np.testing.assert_allclose(phi2 @ gam1 + gam2, gam, rtol=1e-12)


def test_overflowing_exponential_is_a_numerical_error_with_the_field() -> None:
    with pytest.raises(NumericalError) as caught:
        sample_zero_order_hold([[1000.0]], [[1.0]], sample_time=1.0, field=("plant", "a"))
    assert caught.value.field == ("plant", "a")
    assert "not finite" in caught.value.detail


def test_default_field_is_the_model() -> None:
    with pytest.raises(NumericalError) as caught:
        sample_zero_order_hold([[2.0, 0.0], [0.0, 900.0]], [[1.0], [1.0]], sample_time=1.0)
    assert caught.value.field == ("model",)
