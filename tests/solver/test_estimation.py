"""Estimators: the Kalman filter against its defining equations, detectability, layouts.

Sources: the steady-state Kalman filter (Kalman 1960) in current-estimator form — prior
covariance ``P`` solving the filter Riccati equation, ``S = C P C' + Rv``, ``L = P C' S^-1``,
posterior ``(I - L C) P`` — with ``scipy.linalg.solve_discrete_are`` as the reference
solver; the PBH detectability test (Hautus) and the offset-free rank condition
``rank [[I - A, -Bd], [C, Cd]] = n + nd`` (Pannocchia and Rawlings 2003, Lemma 1, recalled
from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.errors import NumericalError
from service.solver.estimation.estimator import (
    DEFAULT_DISTURBANCE_NOISE,
    DEFAULT_MEASUREMENT_NOISE,
    DEFAULT_STATE_NOISE,
    augmented_model,
    design_estimator,
    unmeasured_outputs,
)
from service.solver.estimation.sizes import natural_sizes
from service.solver.evaluation.simulation import measured_output_map
from tests.conftest import random_plant


def _random_covariance(rng: np.random.Generator, size: int, floor: float = 0.1) -> np.ndarray:
    g = rng.normal(size=(size, size))
    return g @ g.T + floor * np.eye(size)


@pytest.mark.parametrize("disturbance", ["output", "input", "none"])
def test_kalman_gain_solves_the_filter_riccati_and_innovation_equations(rng, disturbance):
    n, m, p = 4, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=0.95)
    nd = {"output": p, "input": m, "none": 0}[disturbance]
    qx, qd, rv = _random_covariance(rng, n), _random_covariance(rng, nd) if nd else None, _random_covariance(rng, p)
    est = design_estimator(
        a, b, c, kind="kalman", disturbance=disturbance, process_noise=qx, disturbance_noise=qd, measurement_noise=rv
    )
    aa, ca = est.a, est.c_measured
    qw = scipy.linalg.block_diag(qx, qd) if nd else qx
    np.testing.assert_allclose(est.process_noise, qw, atol=1e-14)
    # Reference: scipy.linalg.solve_discrete_are on the dual pair (A', C').
    p_ref = scipy.linalg.solve_discrete_are(aa.T, ca.T, qw, rv)
    np.testing.assert_allclose(est.covariance, p_ref, rtol=1e-9, atol=1e-10)
    # Innovation covariance and gain (Kalman filter measurement update).
    pk = est.covariance
    s = ca @ pk @ ca.T + rv
    np.testing.assert_allclose(est.innovation_covariance, s, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(est.gain, pk @ ca.T @ np.linalg.inv(s), rtol=1e-9, atol=1e-11)
    # Measurement update then time update returns P: P = A (I - L C) P A' + Qw.
    posterior = (np.eye(aa.shape[0]) - est.gain @ ca) @ pk
    np.testing.assert_allclose(aa @ posterior @ aa.T + qw, pk, rtol=1e-9, atol=1e-9)
    # Estimator poles: eig((I - L C) A), the same as the prior-error matrix A (I - L C).
    np.testing.assert_allclose(
        np.sort_complex(est.poles),
        np.sort_complex(np.linalg.eigvals(aa @ (np.eye(aa.shape[0]) - est.gain @ ca))),
        atol=1e-9,
    )
    assert np.abs(est.poles).max() < 1.0


def test_kalman_covariance_is_the_limit_of_the_covariance_recursion(rng):
    # Independent of any Riccati solver: iterate the time-varying filter's covariance
    # P+ = A (P - P C' (C P C' + R)^-1 C P) A' + Q from P = Q until it settles (Kalman 1960).
    a, b, c = random_plant(rng, 3, 1, 1, radius=0.9)
    est = design_estimator(
        a, b, c, kind="kalman", process_noise=[0.5, 0.2, 0.1], disturbance_noise=[0.3], measurement_noise=[0.05]
    )
    aa, ca, q, r = est.a, est.c_measured, est.process_noise, est.measurement_noise
    pk = q.copy()
    for _ in range(5000):
        pk = aa @ (pk - pk @ ca.T @ np.linalg.solve(ca @ pk @ ca.T + r, ca @ pk)) @ aa.T + q
    np.testing.assert_allclose(est.covariance, pk, rtol=1e-8, atol=1e-10)


def test_disturbance_kinds_are_kalman_filters_with_the_documented_default_covariances(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    sizes = natural_sizes(a, b, c)
    for kind, disturbance in [("output_disturbance", "output"), ("input_disturbance", "input")]:
        est = design_estimator(a, b, c, kind=kind)
        same = design_estimator(
            a,
            b,
            c,
            kind="kalman",
            disturbance=disturbance,
            # the documented defaults, each per signal in its natural size (sizes.py)
            process_noise=DEFAULT_STATE_NOISE * sizes.states**2,
            disturbance_noise=DEFAULT_DISTURBANCE_NOISE
            * (sizes.outputs if disturbance == "output" else sizes.inputs) ** 2,
            measurement_noise=DEFAULT_MEASUREMENT_NOISE * sizes.outputs**2,
        )
        assert est.disturbance == disturbance and est.kind == kind
        np.testing.assert_allclose(est.gain, same.gain, atol=1e-12)


def test_scalar_output_disturbance_gain_by_hand():
    # A pure random-walk disturbance seen directly (x-part has no noise in the limit):
    # p = p - p^2/(p + r) + q gives p = (q + sqrt(q^2 + 4 q r))/2 and L = p/(p + r).
    # With A = 0 the plant state is forgotten each step, so the d-channel is exactly this.
    q, r = 0.7, 0.2
    est = design_estimator([[0.0]], [[1.0]], [[1.0]], process_noise=[0.0], disturbance_noise=[q], measurement_noise=[r])
    p_d = (q + np.sqrt(q * q + 4 * q * r)) / 2
    np.testing.assert_allclose(est.gain[1, 0], p_d / (p_d + r), rtol=1e-10)
    np.testing.assert_allclose(np.sort(est.poles.real), [0.0, 1 - p_d / (p_d + r)], atol=1e-10)


def test_augmented_layouts_follow_the_disturbance_model(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    aa, ba, ca, bd, cd = augmented_model(a, b, c, "output")
    np.testing.assert_array_equal(bd, np.zeros((3, 2)))
    np.testing.assert_array_equal(cd, np.eye(2))
    np.testing.assert_array_equal(aa[3:, 3:], np.eye(2))
    aa, ba, ca, bd, cd = augmented_model(a, b, c, "input")
    np.testing.assert_array_equal(bd, b)
    np.testing.assert_array_equal(cd, np.zeros((2, 2)))
    np.testing.assert_array_equal(aa[:3, 3:], b)
    np.testing.assert_array_equal(ba[3:], np.zeros((2, 2)))
    est = design_estimator(a, b, c, kind="input_disturbance")
    assert est.disturbance_slice == slice(3, 5) and est.augmented_size == 5
    np.testing.assert_array_equal(est.model_a, a)
    np.testing.assert_array_equal(est.model_c, c)


def test_full_state_reads_the_state_and_has_no_estimator_poles(rng):
    a, b, c = random_plant(rng, 3, 2, 2)
    est = design_estimator(a, b, c, kind="full_state")
    np.testing.assert_array_equal(est.gain, np.eye(3))
    np.testing.assert_array_equal(est.c_measured, np.eye(3))
    assert est.poles.size == 0 and est.disturbance_size == 0 and est.full_state


def _pbh_detectable(a: np.ndarray, c: np.ndarray) -> bool:
    # PBH (Hautus) test: detectable iff rank [zI - A; C] = n at every |z| >= 1.
    n = a.shape[0]
    for z in np.linalg.eigvals(a):
        if abs(z) >= 1 - 1e-9:
            s = np.linalg.svd(np.vstack([z * np.eye(n) - a, c]), compute_uv=False)
            if s[-1] <= 1e-9 * s[0]:
                return False
    return True


def test_detectability_verdict_agrees_with_a_direct_pbh_test_of_the_augmented_model(rng):
    # Random plants, some with an integrator (output disturbance then fails) and some with
    # a steady-state gain of rank 1 (input disturbance then fails): the estimator must be
    # refused exactly when the augmented pair fails the PBH test.
    verdicts = []
    for trial in range(24):
        n, m, p = 3, 2, 2
        poles = rng.uniform(-0.9, 0.9, size=n)
        if trial % 3 == 1:  # an integrator
            poles[0] = 1.0
        t = rng.normal(size=(n, n))
        a = t @ np.diag(poles) @ np.linalg.inv(t)
        b, c = rng.normal(size=(n, m)), rng.normal(size=(p, n))
        if trial % 3 == 2:  # rank-one steady-state gain: the second input acts like the first
            b[:, 1] = 2.0 * b[:, 0]
        for disturbance in ("output", "input"):
            aa, _, ca, _, _ = augmented_model(a, b, c, disturbance)
            expected = _pbh_detectable(aa, ca)
            try:
                design_estimator(a, b, c, kind="kalman", disturbance=disturbance)
                got = True
            except NumericalError:
                got = False
            assert got == expected, (trial, disturbance)
            verdicts.append(got)
    assert True in verdicts and False in verdicts


def test_more_disturbances_than_measured_outputs_is_refused():
    with pytest.raises(NumericalError) as caught:
        design_estimator([[0.9]], [[1.0, 0.5]], [[1.0]], kind="input_disturbance")
    assert caught.value.field == ("estimator", "kind")
    assert "2 disturbances" in caught.value.detail and "only 1 measured output" in caught.value.detail


def test_a_plant_zero_at_one_hides_an_input_disturbance():
    # G(z) = (z - 1) / ((z - 0.5)(z - 0.3)) has a zero at z = 1 (a differentiating plant):
    # a constant input disturbance leaves no trace on the output at steady state.
    # Controllable canonical form of that transfer function (common practice).
    a = np.array([[0.8, -0.15], [1.0, 0.0]])
    b = np.array([[1.0], [0.0]])
    c = np.array([[1.0, -1.0]])
    with pytest.raises(NumericalError) as caught:
        design_estimator(a, b, c, kind="input_disturbance", input_labels=["steam"])
    assert caught.value.field == ("estimator", "kind")
    assert "zero of the plant at z = 1" in caught.value.detail and "on steam" in caught.value.detail
    assert "rank [[I - A, -Bd], [C, Cd]] = 2 < n + nd = 3" in caught.value.detail
    design_estimator(a, b, c, kind="output_disturbance")  # the other model is fine


def test_a_singular_steady_state_gain_names_the_hidden_input_direction():
    a = np.diag([0.5, 0.5])
    b = np.array([[1.0, 1.0], [1.0, 1.0]])  # both inputs do the same thing
    with pytest.raises(NumericalError) as caught:
        design_estimator(a, b, np.eye(2), kind="input_disturbance")
    assert "along u1 - u2" in caught.value.detail


def test_an_integrating_plant_refuses_output_disturbances_but_takes_input_ones():
    # For A = 1: [[I - A, 0], [C, I]] = [[0, 0], [1, 1]] has rank 1 < 2 (output model);
    # [[I - A, -B], [C, 0]] = [[0, -1], [1, 0]] has rank 2 (input model) — by hand.
    with pytest.raises(NumericalError) as caught:
        design_estimator([[1.0]], [[1.0]], [[1.0]], kind="output_disturbance", output_labels=["level"])
    assert caught.value.field == ("estimator", "kind")
    assert "pole at z = 1" in caught.value.detail and "on level" in caught.value.detail
    est = design_estimator([[1.0]], [[1.0]], [[1.0]], kind="input_disturbance")
    assert np.abs(est.poles).max() < 1.0


def test_an_unseen_unstable_plant_mode_is_refused_with_the_model_field():
    a = np.diag([1.2, 0.5])
    with pytest.raises(NumericalError) as caught:
        design_estimator(a, [[1.0], [1.0]], [[0.0, 1.0]], kind="kalman", disturbance="none")
    assert caught.value.field == ("model",)
    assert "z = 1.2" in caught.value.detail


def test_a_unit_circle_mode_without_process_noise_is_refused():
    # An integrator with zero process noise: the Riccati equation has no stabilizing
    # solution (the noise must excite every mode on the unit circle; common practice).
    with pytest.raises(NumericalError) as caught:
        design_estimator([[1.0]], [[1.0]], [[1.0]], kind="kalman", disturbance="none", process_noise=[0.0])
    assert caught.value.field == ("estimator",)


# --------------------------------------------------------------------------- measured outputs of their own


@pytest.mark.parametrize("disturbance", ["output", "input", "per_output"])
def test_the_filter_reads_measured_outputs_of_their_own(rng, disturbance):
    # three sensors for two controlled outputs: the filter is the Kalman filter of (A_a, [Cy, Cd])
    n, m, p, py = 4, 2, 2, 3
    a, b, c = random_plant(rng, n, m, p, radius=0.9)
    cy = rng.normal(size=(py, n))
    nd = {"output": py, "input": m, "per_output": py}[disturbance]
    qx, qd, rv = _random_covariance(rng, n), _random_covariance(rng, nd), _random_covariance(rng, py)
    est = design_estimator(
        a,
        b,
        c,
        kind="kalman",
        disturbance=disturbance,
        process_noise=qx,
        disturbance_noise=qd,
        measurement_noise=rv,
        c_measured=cy,
    )
    aa, ca = est.a, est.c_measured
    assert ca.shape == (py, n + nd) and est.c_controlled.shape == (p, n + nd)
    np.testing.assert_array_equal(ca[:, :n], cy)
    np.testing.assert_array_equal(est.c_controlled[:, :n], c)
    # Reference: scipy.linalg.solve_discrete_are on the dual pair, the measured rows (Kalman 1960)
    qw = scipy.linalg.block_diag(qx, qd)
    p_ref = scipy.linalg.solve_discrete_are(aa.T, ca.T, qw, rv)
    np.testing.assert_allclose(est.covariance, p_ref, rtol=1e-9, atol=1e-10)
    s = ca @ p_ref @ ca.T + rv
    np.testing.assert_allclose(est.gain, p_ref @ ca.T @ np.linalg.inv(s), rtol=1e-8, atol=1e-10)
    # random controlled rows are no combination of three random sensors of four states: Dz = 0
    # unless the disturbance enters the state (input disturbances: Cd = 0 anyway)
    np.testing.assert_array_equal(est.disturbance_controlled, np.zeros((p, nd)))


def test_a_controlled_output_that_is_a_combination_of_sensors_sees_their_bias(rng):
    # z1 = y1 + 2 y2 (a sum of two sensors), z2 measured by no sensor
    n, m = 3, 2
    a, b, _ = random_plant(rng, n, m, 1, radius=0.9)
    cy = rng.normal(size=(2, n))
    c = np.vstack([cy[0] + 2.0 * cy[1], rng.normal(size=n)])
    est = design_estimator(a, b, c, kind="output_disturbance", c_measured=cy)
    # an output bias d on the sensors (Cd = I) shows in z1 as d1 + 2 d2 (z1 = y1 + 2 y2), and not in z2
    np.testing.assert_allclose(est.disturbance_controlled, [[1.0, 2.0], [0.0, 0.0]], atol=1e-12)
    np.testing.assert_array_equal(unmeasured_outputs(c, cy), [False, True])


def test_the_measured_feedthrough_is_kept_and_leaves_the_filter_alone(rng):
    a, b, c = random_plant(rng, 3, 1, 1, radius=0.9)
    cy = rng.normal(size=(1, 3))
    plain = design_estimator(a, b, c, c_measured=cy)
    fed = design_estimator(a, b, c, c_measured=cy, d_measured=[[0.4]])
    np.testing.assert_array_equal(fed.gain, plain.gain)  # the filter reads y - Dy u: the same filter
    np.testing.assert_array_equal(fed.feedthrough, [[0.4]])
    assert plain.measured_feedthrough is None and not np.any(plain.feedthrough)


def test_the_output_disturbance_reaches_a_sensor_only_on_its_own_signal():
    c = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    cm = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]])
    np.testing.assert_array_equal(measured_output_map(c, cm), [[0, 1], [0, 0], [1, 0]])
    # a sensor with a feed-through is another signal than the output it reads
    np.testing.assert_array_equal(measured_output_map(c, cm, np.array([[0.0], [0.0], [0.5]])), [[0, 1], [0, 0], [0, 0]])
    np.testing.assert_array_equal(measured_output_map(c, c), np.eye(2))


def test_a_riccati_equation_that_overflows_says_so_in_the_trade_s_words():
    # Found in an audit of hostile input: a measurement noise of 1e308 made the filter's Riccati
    # equation fail with the library's own words in the answer ("Failed to find a finite
    # solution.", or "array must not contain infs or NaNs" for an output 1e-300 times its state).
    with pytest.raises(NumericalError) as caught:
        design_estimator(
            [[0.9, 0.0], [0.0, 0.8]],
            [[1.0], [0.5]],
            [[1.0, 0.0], [0.0, 1.0]],
            kind="kalman",
            disturbance="none",
            measurement_noise=[1.0, 1e308],
        )
    assert caught.value.field == ("estimator",)
    assert "overflowed double precision" in caught.value.detail
    assert "Failed" not in caught.value.detail and "NaN" not in caught.value.detail
