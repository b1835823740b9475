"""The estimator and the disturbance handling of /simulate on a plant of every day, against references.

Invented scenario: the bottoms drum of a stripper, in absolute units around its operating
point.  Three inputs for two outputs (steam flow in kg/h, thousands; outlet and reflux valves
in %), the bottoms impurity in mol/mol (around 2e-3) behind a dead time of 13 samples from
the steam, the drum level in m (integrating), and a measured feed flow (kg/h).  The true plant
has 20 % more gain on every input.  Found in an audit of the estimator: an indefinite noise
covariance of badly scaled signals passed the positive-semidefinite check, a measurement-noise
covariance of two sensors correlated by exactly 1 passed the positive-definite one, and a
Riccati equation that had no solution because an integrator was given no process noise was
reported as a numeric overflow.
"""

from __future__ import annotations

import copy

import control
import numpy as np
import pytest

from tests.api.conftest import assert_field_problem
from tests.references import current_kalman_gain, horizon_gain, prediction_by_sums

DELAY = 12  # samples of the steam's delay chain (plus one of the impurity's own lag)
N = 2 + DELAY
HP, HU = 40, 8
OP_U, OP_Y, OP_D = np.array([3200.0, 45.0, 30.0]), np.array([2.0e-3, 1.2]), np.array([5000.0])
SPAN_U, SPAN_Y = np.array([2000.0, 100.0, 100.0]), np.array([1e-3, 2.0])
Q, R = np.array([1.0, 1.0]), np.array([0.5, 0.5, 0.5])
# explicit covariances, engineering units squared: impurity, level, the 12 steam states;
# the impurity's output bias and the level's rate bias (m per sample); the two sensors
PROCESS = [1e-10, 1e-4] + [1e2] * DELAY
DISTURBANCE = [1e-10, 1e-6]
MEASUREMENT = [4e-10, 2.5e-5]
STEPS = 400


def plant(gain: float = 1.0) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(A, B, C, Bd)`` in deviations; states impurity, level, then the steam's delay chain."""
    a, b, bd = np.zeros((N, N)), np.zeros((N, 3)), np.zeros((N, 1))
    a[0, 0], a[0, N - 1], b[0, 2], bd[0, 0] = 0.92, -1.6e-8, -8e-6, 4e-9
    a[1, 1], b[1, 1], b[1, 2], bd[1, 0] = 1.0, -0.004, -0.0005, 4e-5
    b[2, 0] = 1.0
    for i in range(3, N):
        a[i, i - 1] = 1.0
    c = np.zeros((2, N))
    c[0, 0] = c[1, 1] = 1.0
    return a, b * gain, c, bd


def model(gain: float = 1.0) -> dict:
    a, b, c, bd = plant(gain)
    return {
        "kind": "state_space",
        "a": a.tolist(),
        "b": b.tolist(),
        "c": c.tolist(),
        "b_disturbance": bd.tolist(),
        "time_domain": "discrete",
        "sample_time": 1.0,
        "inputs": [
            {"name": "steam_flow", "unit": "kg/h", "span": 2000.0},
            {"name": "outlet_valve", "unit": "%", "span": 100.0},
            {"name": "reflux_valve", "unit": "%", "span": 100.0},
        ],
        "outputs": [
            {"name": "bottoms_impurity", "unit": "mol/mol", "span": 1e-3},
            {"name": "drum_level", "unit": "m", "span": 2.0},
        ],
        "disturbances": [{"name": "feed_flow", "unit": "kg/h", "span": 2000.0}],
        "operating_point": {"inputs": OP_U.tolist(), "outputs": OP_Y.tolist(), "disturbances": OP_D.tolist()},
    }


def kalman() -> dict:
    return {
        "kind": "kalman",
        "disturbance": "per_output",
        "process_noise": PROCESS,
        "disturbance_noise": DISTURBANCE,
        "measurement_noise": MEASUREMENT,
    }


def request(*, gain: float = 1.2, estimator: dict | None = None, move: float = 0.5) -> dict:
    true = {k: v for k, v in model(gain).items() if k in ("kind", "a", "b", "c", "b_disturbance", "sample_time")}
    return {
        "model": model(),
        "horizons": {"prediction": HP, "control": HU},
        "weights": {"output": Q.tolist(), "move": [move] * 3},
        "estimator": kalman() if estimator is None else estimator,
        "scenario": {
            "steps": STEPS,
            "setpoint_changes": [{"step": 10, "setpoint": [1.8e-3, 1.2]}],
            "measured_disturbances": [{"step": 60, "value": [5400.0]}],
            "input_disturbances": [{"step": 120, "value": [0.0, 3.0, 0.0]}],
            "output_disturbances": [{"step": 200, "value": [5e-5, 0.0]}],
            "true_plant": true,
        },
    }


def augmented() -> tuple[np.ndarray, np.ndarray]:
    """The per-output disturbance model written by hand: a bias on the impurity, one on the level's rate."""
    a, _, c, _ = plant()
    bdist = np.zeros((N, 2))
    bdist[1, 1] = 1.0  # a constant inflow into the level (the integrator's null direction)
    cd = np.array([[1.0, 0.0], [0.0, 0.0]])
    return np.block([[a, bdist], [np.zeros((2, N)), np.eye(2)]]), np.hstack([c, cd])


def reference_gain() -> np.ndarray:
    """``Kh`` in engineering units: spans turn the weights into ``Q / span^2``, ``R / span^2`` (README)."""
    a, b, c, _ = plant()
    _, _, g, _ = prediction_by_sums(a, b, c, HP, HU)
    return horizon_gain(g, Q / SPAN_Y**2, R / SPAN_U**2, HP, HU)


def independent_loop(gain_l, kh, true_gain, *, measured=True, unmeasured=True):
    """The loop of the design notes in deviations, written from scratch with numpy.

    ``x(k|k) = x(k|k-1) + L (y - C_a x(k|k-1))``, ``du = Kh (1 (x) r - Fx_a x(k|k) - Fu u(k-1) -
    Fd_a d_m)``, the true plant ``x+ = A_t x + B_t (u + d_in) + Bd d_m``, the filter's prediction
    ``x(k+1|k) = A_a x(k|k) + B_a u + Bd_a d_m``.  Returns outputs and inputs (deviations).
    """
    a, b, c, bd = plant()
    at, bt, _, _ = plant(true_gain)
    aa, ca = augmented()
    ba, bda = np.vstack([b, np.zeros((2, 3))]), np.vstack([bd, np.zeros((2, 1))])
    fxa, fu, _, fda = prediction_by_sums(aa, ba, ca, HP, HU, bda)
    x, xp, u = np.zeros(N), np.zeros(N + 2), np.zeros(3)
    outputs, inputs = [], []
    for k in range(STEPS):
        r = np.array([-2e-4, 0.0]) if k >= 10 else np.zeros(2)
        dm = np.array([400.0]) if measured and k >= 60 else np.zeros(1)
        din = np.array([0.0, 3.0, 0.0]) if unmeasured and k >= 120 else np.zeros(3)
        dout = np.array([5e-5, 0.0]) if unmeasured and k >= 200 else np.zeros(2)
        z = c @ x + dout
        xf = xp + gain_l @ (z - ca @ xp)
        u = u + kh @ (np.tile(r, HP) - fxa @ xf - fu @ u - fda @ dm)
        outputs.append(z)
        inputs.append(u.copy())
        x = at @ x + bt @ (u + din) + bd @ dm
        xp = aa @ xf + ba @ u + bda @ dm
    return np.array(outputs), np.array(inputs)


@pytest.fixture(scope="module")
def client():
    from fastapi.testclient import TestClient

    from service.api import create_app

    with TestClient(create_app(), raise_server_exceptions=False) as c:
        yield c


@pytest.fixture(scope="module")
def run(client):
    r = client.post("/simulate", json=request())
    assert r.status_code == 200, r.text
    return r.json()


def _scaled_gain(gain_l: np.ndarray) -> np.ndarray:
    """The filter gain between signals divided by their sizes (states by the spans they carry)."""
    state = np.concatenate([[1e-3, 2.0], np.full(DELAY, 2000.0), [1e-3, 2.0]])
    return gain_l / state[:, None] * SPAN_Y[None, :]


def test_the_kalman_gain_is_the_one_of_scipy_s_riccati_solution_and_python_control(run):
    aa, ca = augmented()
    qw, rv = np.diag(PROCESS + DISTURBANCE), np.diag(MEASUREMENT)
    gain_l, _ = current_kalman_gain(aa, ca, qw, rv)  # scipy.linalg.solve_discrete_are
    reported = np.array(run["estimator"]["gain"]["values"])
    assert run["estimator"]["gain"]["rows"][-2:] == [
        "bottoms_impurity.output_disturbance",
        "drum_level.rate_disturbance",
    ]
    # in signals divided by their sizes: the steam states' gains from the impurity are ~1e-9
    # of the rest and differ between solvers by rounding (the Riccati equation's conditioning)
    scaled, expected = _scaled_gain(reported), _scaled_gain(gain_l)
    np.testing.assert_allclose(scaled, expected, rtol=0, atol=1e-7 * np.abs(expected).max())
    # python-control's dlqe gives the predictor gain A P C' (C P C' + R)^-1 = A L and the poles
    # eig(A - A L C), those of (I - L C) A
    predictor, _, poles = control.dlqe(aa, np.eye(N + 2), ca, qw, rv)
    np.testing.assert_allclose(
        _scaled_gain(aa @ reported), _scaled_gain(np.asarray(predictor)), rtol=0, atol=1e-6 * np.abs(scaled).max()
    )
    mine = np.array([complex(p["real"], p["imag"]) for p in run["estimator"]["poles"]])
    assert run["estimator"]["spectral_radius"] == pytest.approx(np.abs(poles).max(), rel=1e-6)
    # the delay chain's poles at 0 scatter under rounding: compare their power sums (traces)
    for j in range(1, 7):
        assert np.sum(mine**j) == pytest.approx(np.sum(np.asarray(poles) ** j), rel=1e-6, abs=1e-9)


def test_the_run_is_the_loop_written_from_scratch_and_offset_free_with_20_percent_more_gain(run):
    aa, ca = augmented()
    gain_l, _ = current_kalman_gain(aa, ca, np.diag(PROCESS + DISTURBANCE), np.diag(MEASUREMENT))
    outputs, inputs = independent_loop(gain_l, reference_gain(), 1.2)
    got_y = np.array(run["outputs"]) - OP_Y
    got_u = np.array(run["inputs"]) - OP_U
    np.testing.assert_allclose(got_y / SPAN_Y, outputs / SPAN_Y, rtol=0, atol=1e-9)
    np.testing.assert_allclose(got_u / SPAN_U, inputs / SPAN_U, rtol=0, atol=1e-9)
    # offset-free by the disturbance model: both outputs back on their setpoints
    final = np.array(run["setpoints"][-1]) - np.array(run["outputs"][-1])
    assert np.all(np.abs(final / SPAN_Y) < 1e-6)
    # the steady state by hand (true gains 1.2 B): at the final inputs the impurity's balance
    # 0.08 x0 = 1.2 (-1.6e-8 du1 - 8e-6 du3) + 4e-9 d_feed, with x0 = -2e-4 - 5e-5 (setpoint step
    # less the output bias), and the level's 0 = 1.2 (-0.004 (du2 + 3) - 0.0005 du3) + 4e-5 d_feed
    # (the valve's error of 3 % included) hold; the steam's share is free (more inputs than outputs)
    du1, du2, du3 = got_u[-1]
    impurity = 0.08 * (-2e-4 - 5e-5) - (1.2 * (-1.6e-8 * du1 - 8e-6 * du3) + 4e-9 * 400)
    level = 1.2 * (-0.004 * (du2 + 3.0) - 0.0005 * du3) + 4e-5 * 400
    assert abs(impurity) < 1e-6 * 2e-5 and abs(level) < 1e-6 * 0.016
    assert du3 == pytest.approx(2.25, rel=1e-3)  # nearly all of it on the reflux, as Kh weighs it
    assert [o["final_offset"] for o in run["performance"]["outputs"]] == pytest.approx([0.0, 0.0], abs=1e-8)
    # honest verdicts: nothing diverges, no warning of the run; the loop's one pole at 1 is the
    # free steam direction, listed with its cause
    assert run["diverged_at"] is None and run["warnings"] == []
    assert not run["whole_loop"]["stable"] and run["whole_loop"]["separation_holds"]
    assert [m["cause"] for m in run["whole_loop"]["marginal_modes"]] == ["free_input_direction"]


def test_the_feed_forward_gain_is_kh_times_the_disturbance_s_free_response(client):
    a, b, c, bd = plant()
    _, _, _, fd = prediction_by_sums(a, b, c, HP, HU, bd)
    body = request(gain=1.0)
    body.pop("scenario")
    body.pop("estimator")
    answer = client.post("/design", json=body).json()
    kd = np.array(answer["gain"]["disturbance"])
    np.testing.assert_allclose(kd, reference_gain() @ fd, rtol=1e-8)  # du = ... - Kd d_m (README)
    # on the model itself and without unmeasured disturbances the filter sees no innovation:
    # the first move at the feed step is -Kd times the step, and the run is the loop by hand
    body = request(gain=1.0)
    for key in ("input_disturbances", "output_disturbances"):
        body["scenario"].pop(key)
    run = client.post("/simulate", json=body).json()
    moves = np.diff(np.array(run["inputs"]), axis=0)
    np.testing.assert_allclose(moves[59], -kd[:, 0] * 400.0, rtol=1e-8)
    aa, ca = augmented()
    gain_l, _ = current_kalman_gain(aa, ca, np.diag(PROCESS + DISTURBANCE), np.diag(MEASUREMENT))
    outputs, _ = independent_loop(gain_l, reference_gain(), 1.0, unmeasured=False)
    np.testing.assert_allclose((np.array(run["outputs"]) - OP_Y) / SPAN_Y, outputs / SPAN_Y, rtol=0, atol=1e-9)
    assert np.abs(outputs[-1] - [-2e-4, 0.0]).max() / 1e-3 < 1e-6  # the feed rejected at steady state


def test_the_true_loop_s_poles_are_those_of_the_loop_by_hand_and_the_verdict_follows_them(client):
    # four times the gain with light move weights: the loop on the true plant is unstable
    body = request(gain=4.0, move=0.005)
    run = client.post("/simulate", json=body).json()
    aa, ca = augmented()
    gain_l = np.array(run["estimator"]["gain"]["values"])  # the filter checked above; here the loop
    a, b, c, _ = plant()
    _, _, g, _ = prediction_by_sums(a, b, c, HP, HU)
    kh = horizon_gain(g, Q / SPAN_Y**2, np.full(3, 0.005) / SPAN_U**2, HP, HU)
    at, bt, ct, _ = plant(4.0)
    ba = np.vstack([b, np.zeros((2, 3))])
    fxa, fu, _, _ = prediction_by_sums(aa, ba, ca, HP, HU)
    size = 2 * N + 2 + 3
    loop = np.zeros((size, size))
    for j in range(size):  # the loop on [x; x(k|k-1); u(k-1)], column by column
        s = np.eye(size)[j]
        x, xp, u = s[:N], s[N : 2 * N + 2], s[2 * N + 2 :]
        xf = xp + gain_l @ (ct @ x - ca @ xp)
        u = u - kh @ (fxa @ xf + fu @ u)
        loop[:, j] = np.concatenate([at @ x + bt @ u, aa @ xf + ba @ u, u])
    radius = float(np.abs(np.linalg.eigvals(loop)).max())
    assert radius > 1.01
    assert run["true_loop"]["spectral_radius"] == pytest.approx(radius, rel=1e-6)
    assert not run["true_loop"]["stable"]
    codes = [w["code"] for w in run["warnings"]]
    assert "true_loop_unstable" in codes and ("run_diverged" in codes or "run_diverging" in codes)
    # and 20 % more gain with the same tuning stays stable and says nothing
    calm = client.post("/simulate", json=request(gain=1.2, move=0.005)).json()
    assert calm["true_loop"]["spectral_radius"] <= 1.0 + 1e-9 and calm["warnings"] == []


def _with_estimator(**changes) -> dict:
    est = kalman()
    est.update(changes)
    return request(estimator={k: v for k, v in est.items() if v is not None})


def _indefinite_process_noise() -> list[list[float]]:
    # the impurity (variance 1e-10) and the last steam state (variance 100) correlated by 5:
    # no covariance, though the smallest eigenvalue (-2.4e-9) is tiny beside the largest entry
    w = np.diag(PROCESS)
    w[0, N - 1] = w[N - 1, 0] = 5.0 * np.sqrt(1e-10 * 1e2)
    return w.tolist()


def _sensors_correlated_by_one() -> list[list[float]]:
    # impurity and level sensors correlated by exactly 1: a noise-free combination of them,
    # whose smallest eigenvalue (about 1e-25) is positive by rounding alone
    return [[4e-10, 1e-7], [1e-7, 2.5e-5]]


@pytest.mark.parametrize(
    ("body", "where", "words"),
    [
        (_with_estimator(process_noise=_indefinite_process_noise()), "/estimator/process_noise", "semidefinite"),
        (_with_estimator(measurement_noise=_sensors_correlated_by_one()), "/estimator/measurement_noise", "definite"),
        (_with_estimator(measurement_noise=[4e-10, -2.5e-5]), "/estimator/measurement_noise/1", "negative"),
        (_with_estimator(disturbance_noise=[1e-10, -1e-6]), "/estimator/disturbance_noise/1", "negative"),
        (_with_estimator(process_noise=PROCESS[:-1]), "/estimator/process_noise", "expected 14"),
        (_with_estimator(measurement_noise=[*MEASUREMENT, 1.0]), "/estimator/measurement_noise", "expected 2"),
        # the level's integrator and its rate bias without noise: no stabilizing Riccati solution
        (
            _with_estimator(process_noise=[1e-10, 0.0] + [1e2] * DELAY, disturbance_noise=[1e-10, 0.0]),
            "/estimator",
            "z = 1",
        ),
        # a bias on the level's value looks like its integrator drifting (undetectable)
        (request(estimator={"kind": "output_disturbance"}), "/estimator/kind", "integrat"),
        (
            request(estimator={"kind": "per_output", "disturbances": ["output", "output"]}),
            "/estimator/disturbances",
            "undetectable",
        ),
        # three input disturbances, two measured outputs
        (request(estimator={"kind": "input_disturbance"}), "/estimator/kind", "only 2 measured"),
        # a kalman estimator's model is its `disturbance` field's (given, or its default 'output')
        (
            request(estimator={"kind": "kalman", "disturbance": "input"}),
            "/estimator/disturbance",
            "Use disturbance 'per_output'",
        ),
        (request(estimator={"kind": "kalman"}), "/estimator/disturbance", "rate of 'drum_level'"),
    ],
)
def test_bad_estimator_settings_are_422s_naming_the_field(client, body, where, words):
    found = assert_field_problem(client.post("/simulate", json=body), 422, where)
    details = " ".join(e["detail"] for e in found["errors"] if e["pointer"] == where)
    assert words in details
    assert "overflow" not in details  # a mode without noise is no overflow


def test_measured_disturbance_values_out_of_place_are_422s(client):
    body = request()
    body["scenario"]["measured_disturbances"] = [{"step": 60, "value": [5400.0, 1.0]}]
    assert_field_problem(client.post("/simulate", json=body), 422, "/scenario/measured_disturbances/0/value")
    body = request()
    body["scenario"]["measured_disturbances"] = [{"step": STEPS, "value": [5400.0]}]
    assert_field_problem(client.post("/simulate", json=body), 422, "/scenario/measured_disturbances/0/step")
    body = copy.deepcopy(request())
    body["scenario"]["true_plant"].pop("b_disturbance")
    assert_field_problem(client.post("/simulate", json=body), 422, "/scenario/true_plant")


def test_full_covariances_of_badly_scaled_signals_pass_and_give_the_reference_gain(client):
    # the impurity (variance 1e-10) correlated by 0.9 with the last steam state (variance 100),
    # the two sensors by 0.5: covariances in any units, which the unit-free checks must accept
    process = np.diag(PROCESS)
    process[0, N - 1] = process[N - 1, 0] = 0.9 * np.sqrt(1e-10 * 1e2)
    measurement = np.diag(MEASUREMENT)
    measurement[0, 1] = measurement[1, 0] = 0.5 * np.sqrt(4e-10 * 2.5e-5)
    body = _with_estimator(process_noise=process.tolist(), measurement_noise=measurement.tolist())
    r = client.post("/simulate", json=body)
    assert r.status_code == 200, r.text
    aa, ca = augmented()
    qw = np.zeros((N + 2, N + 2))
    qw[:N, :N], qw[N:, N:] = process, np.diag(DISTURBANCE)
    gain_l, _ = current_kalman_gain(aa, ca, qw, measurement)  # scipy.linalg.solve_discrete_are
    scaled, expected = _scaled_gain(np.array(r.json()["estimator"]["gain"]["values"])), _scaled_gain(gain_l)
    np.testing.assert_allclose(scaled, expected, rtol=0, atol=1e-7 * np.abs(expected).max())
