"""Measured outputs of their own (model.c_measured, d_measured) in /simulate and /design/export.

The plant (invented): a heater warms a stream (state 1, the controlled inlet temperature)
that mixes into a vessel (state 2); only the vessel's outlet temperature is measured.  The
true plant's heater is 20 % stronger than the model's.

References, each written here independently of the service:

- the steady-state Kalman filter in current-estimator form (Kalman 1960; common practice):
  ``P`` from ``scipy.linalg.solve_discrete_are(A', C', Qw, Rv)``, ``L = P C' (C P C' + Rv)^-1``,
  ``x(k|k) = x(k|k-1) + L (y(k) - D u(k) - C x(k|k-1))``, ``x(k+1|k) = A x(k|k) + B u(k)``,
  with an input disturbance ``[x; d]`` (``Bd = B``), the textbook offset-free augmentation
  (Muske and Badgwell 2002);
- the unconstrained predictive law from the stacked predictions built with matrix powers,
  ``du = first rows of (G' Q G + R)^-1 G' Q (T - Fx x - Fu u(k-1))`` (the standard
  formulation, common practice);
- ``scipy.signal.dlsim`` runs the exported state-space law; ``tests/api/iec_st.py`` (a lark
  grammar of IEC 61131-3 Structured Text) runs the exported block;
- closed-loop poles as ``numpy.linalg.eigvals`` of the loop matrix written out by hand.
"""

from __future__ import annotations

import copy
import csv
import io

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
import scipy.signal

from tests.api.conftest import invalid_fields
from tests.api.iec_st import FunctionBlock

A = np.array([[0.8, 0.0], [0.3, 0.7]])
B = np.array([[0.5], [0.0]])
CZ = np.array([[1.0, 0.0]])  # controlled: the inlet temperature, not measured
CM = np.array([[0.0, 1.0]])  # measured: the outlet temperature
HP, HU = 20, 3
Q, R = 1.0, 0.1
QW, QD, RV = [0.01, 0.01], [1.0], [0.1]  # the filter's covariances, given explicitly


def _model(b=B, d_measured=None):
    model = {
        "kind": "state_space",
        "a": A.tolist(),
        "b": b.tolist(),
        "c": CZ.tolist(),
        "c_measured": CM.tolist(),
        "inputs": [{"name": "heater", "unit": "kW"}],
        "outputs": [{"name": "inlet_temp", "unit": "degC"}],
        "measured": [{"name": "outlet_temp", "unit": "degC"}],
        "sample_time": 1.0,
    }
    if d_measured is not None:
        model["d_measured"] = d_measured
    return model


def _body(*, d_measured=None, noise=True, steps=90):
    scenario = {
        "steps": steps,
        "setpoint_changes": [{"step": 5, "setpoint": [1.0]}],
        "input_disturbances": [{"step": 50, "value": [0.3]}],
        "true_plant": _model(1.2 * B, d_measured),  # 20 % gain error
    }
    if noise:
        scenario["measurement_noise"] = {"std": [0.01], "seed": 3}
    return {
        "model": _model(B, d_measured),
        "horizons": {"prediction": HP, "control": HU},
        "weights": {"output": [Q], "move": [R]},
        "estimator": {
            "kind": "kalman",
            "disturbance": "input",
            "process_noise": QW,
            "disturbance_noise": QD,
            "measurement_noise": RV,
        },
        "scenario": scenario,
    }


def _simulate(client, body, **headers):
    r = client.post("/simulate", json=body, headers=headers)
    assert r.status_code == 200, r.text
    return r


def _augmented():
    """``[x; d]`` with an input disturbance (Bd = B): A_a, B_a, the controlled and measured rows."""
    aa = np.block([[A, B], [np.zeros((1, 2)), np.eye(1)]])
    ba = np.vstack([B, np.zeros((1, 1))])
    return aa, ba, np.hstack([CZ, np.zeros((1, 1))]), np.hstack([CM, np.zeros((1, 1))])


def _kalman(aa, cya):
    qw = np.diag([*QW, *QD])
    rv = np.diag(RV)
    p = scipy.linalg.solve_discrete_are(aa.T, cya.T, qw, rv)
    return p @ cya.T @ np.linalg.inv(cya @ p @ cya.T + rv)


def _horizon_gain(aa, cza):
    """Kh, Fx (on the augmented estimate), Fu by matrix powers (the textbook stacking)."""
    powers = [np.linalg.matrix_power(A, i) for i in range(HP + 1)]
    step = [sum((CZ @ powers[j] @ B for j in range(t)), np.zeros((1, 1))) for t in range(HP + 1)]  # S_t
    fx = np.vstack([cza @ np.linalg.matrix_power(aa, i) for i in range(1, HP + 1)])
    fu = np.vstack([step[i] for i in range(1, HP + 1)])
    g = np.zeros((HP, HU))
    for i in range(1, HP + 1):
        for j in range(min(i, HU)):
            g[i - 1, j] = step[i - j][0, 0]
    h = Q * g.T @ g + R * np.eye(HU)
    kh = np.linalg.solve(h, Q * g.T)[:1]
    return kh, fx, fu


def _hand_loop(body):
    """The loop of the module notes, step by step, on the true plant; returns the series."""
    sc = body["scenario"]
    steps = sc["steps"]
    true = sc["true_plant"]
    at, bt = np.array(true["a"]), np.array(true["b"])
    dm = np.array(body["model"].get("d_measured", [[0.0]]))
    aa, ba, cza, cya = _augmented()
    gain = _kalman(aa, cya)
    kh, fx, fu = _horizon_gain(aa, cza)
    noise = np.zeros((steps, 1))
    if "measurement_noise" in sc:  # the service's documented draw: default_rng(seed), (steps, py) normals
        spec = sc["measurement_noise"]
        noise = np.random.default_rng(spec["seed"]).standard_normal((steps, 1)) * np.array(spec["std"])
    x, xp, u = np.zeros(2), np.zeros(3), np.zeros(1)
    r, d_in = np.zeros(1), np.zeros(1)
    out = {"outputs": [], "measured": [], "inputs": [], "estimates": []}
    for k in range(steps):
        for change in sc["setpoint_changes"]:
            if change["step"] == k:
                r = np.array(change["setpoint"])
        for change in sc["input_disturbances"]:
            if change["step"] == k:
                d_in = np.array(change["value"])
        # the measurement less the feed-through of the input applied at k (true D = model D)
        corrected = CM @ x + noise[k]
        xf = xp + gain @ (corrected - cya @ xp)
        error = np.tile(r, HP) - fx @ xf - fu @ u  # the target outputs are the setpoint (reachable)
        u = u + kh @ error
        out["outputs"].append(CZ @ x)
        out["measured"].append(corrected + dm @ u)
        out["inputs"].append(u.copy())
        out["estimates"].append(xf)
        x = at @ x + bt @ (u + d_in)
        xp = aa @ xf + ba @ u
    return {k: np.array(v) for k, v in out.items()}


# --------------------------------------------------------------------------- /simulate


def test_an_unmeasured_controlled_output_is_offset_free_under_gain_error(client):
    body = _body(noise=False, steps=140)
    sim = _simulate(client, body).json()
    z = np.array(sim["outputs"])[:, 0]
    # the input disturbance model explains a gain error exactly (Muske and Badgwell 2002), so the
    # inlet temperature, which no sensor sees, settles on its setpoint after the setpoint step and
    # again after the unmeasured input disturbance
    assert abs(z[49] - 1.0) < 1e-4
    assert abs(z[60] - 1.0) > 1e-2  # the disturbance did push it off
    assert abs(z[-1] - 1.0) < 1e-6
    assert sim["columns"]["measured"] == ["outlet_temp"] and sim["columns"]["measured_own"]
    assert sim["estimator"]["gain"]["columns"] == ["outlet_temp"]
    assert sim["true_loop"]["stable"] and sim["whole_loop"]["separation_holds"]
    warned = [w for w in sim["warnings"] if w["code"] == "unmeasured_controlled_output"]
    assert len(warned) == 1 and "'inlet_temp'" in warned[0]["message"]


def test_an_output_bias_cannot_hold_an_unmeasured_output_and_the_answer_says_so(client):
    body = _body(noise=False, steps=140)
    body["estimator"] = {"kind": "per_output"}  # a bias on the measured outlet temperature
    sim = _simulate(client, body).json()
    ym, z = np.array(sim["measured"])[:, 0], np.array(sim["outputs"])[:, 0]
    # the steady state of the true plant (x2 = x1 at rest, its gain 20 % high): the model's inferred
    # inlet temperature is held at 1, the true one settles 1.2 times higher, as does the outlet
    assert abs(z[49] - 1.2) < 1e-3 and abs(ym[49] - 1.2) < 1e-3
    assert "unmeasured_controlled_output" in [w["code"] for w in sim["warnings"]]
    measured = copy.deepcopy(body)
    measured["model"]["c_measured"] = measured["scenario"]["true_plant"]["c_measured"] = [[1.0, 0.0]]
    plain = _simulate(client, measured).json()  # measuring the controlled output itself: no warning
    assert "unmeasured_controlled_output" not in [w["code"] for w in plain["warnings"]]
    assert abs(plain["outputs"][-1][0] - 1.0) < 1e-6


@pytest.mark.parametrize("d_measured", [None, [[0.2]]], ids=["c_measured", "c_measured and d_measured"])
def test_the_run_equals_a_hand_written_loop_of_filter_and_law(client, d_measured):
    body = _body(d_measured=d_measured)
    sim = _simulate(client, body).json()
    hand = _hand_loop(body)
    for name in ("outputs", "measured", "inputs", "estimates"):
        got = np.array(sim[name])
        scale = max(1.0, float(np.abs(hand[name]).max()))
        np.testing.assert_allclose(got, hand[name], rtol=0, atol=1e-9 * scale, err_msg=name)
    if d_measured is not None:  # the measurement carries the feed-through of the input applied at k
        ym, u, z = np.array(sim["measured"]), np.array(sim["inputs"]), np.array(sim["estimates"])
        assert np.abs(ym - (z[:, 1:2] + 0.2 * u)).max() < 0.1  # x2 estimate plus D u, up to noise
        assert np.abs(0.2 * u).max() > 0.1


def test_the_csv_answer_has_the_measured_outputs(client):
    body = _body()
    text = _simulate(client, body, accept="text/csv").text
    rows = list(csv.reader(io.StringIO(text)))  # RFC 4180
    assert rows[0] == ["time", "inlet_temp", "inlet_temp.setpoint", "heater", "outlet_temp"]
    sim = _simulate(client, body).json()
    np.testing.assert_array_equal(np.array([float(r[4]) for r in rows[1:]]), np.array(sim["measured"])[:, 0])


def test_the_move_qp_path_reads_the_measured_outputs_too(client):
    body = _body()
    free = _simulate(client, body).json()
    loose = copy.deepcopy(body)
    loose["limits"] = {"input_max": [100.0], "input_min": [-100.0]}  # never active: the QP gives the law's moves
    limited = _simulate(client, loose).json()
    np.testing.assert_allclose(limited["inputs"], free["inputs"], rtol=0, atol=1e-8)
    np.testing.assert_allclose(limited["measured"], free["measured"], rtol=0, atol=1e-8)
    tight = _body(noise=False, steps=140)
    tight["limits"] = {"input_max": [0.9]}
    run = _simulate(client, tight).json()
    u = np.array(run["inputs"])[:, 0]
    assert u.max() <= 0.9 + 1e-9 and u.max() > 0.9 - 1e-6  # the limit acted
    assert abs(run["outputs"][-1][0] - 1.0) < 1e-6  # and the loop is still offset-free


def _match(poles, reference):
    """Largest distance of an optimal one-to-one matching of two pole sets."""
    got = np.array([complex(p["real"], p["imag"]) for p in poles])
    assert got.size == reference.size
    distance = np.abs(got[:, None] - reference[None, :])
    rows, cols = scipy.optimize.linear_sum_assignment(distance)
    return float(distance[rows, cols].max())


def _loop_matrix(at, bt, cmt, gain, kx, ku):
    """On [x; x(k|k-1); u(k-1)]: x(k|k) = L Cm_t x + (I - L Cy) x(k|k-1), u = -K x(k|k) + (I - Ku) u(k-1)."""
    aa, ba, _, cya = _augmented()
    n = at.shape[0]
    mx, mp = gain @ cmt, np.eye(3) - gain @ cya
    u_row = np.hstack([-kx @ mx, -kx @ mp, np.eye(1) - ku])
    xf_row = np.hstack([mx, mp, np.zeros((3, 1))])
    x_row = np.hstack([at, np.zeros((n, 4))]) + bt @ u_row
    return np.vstack([x_row, aa @ xf_row + ba @ u_row, u_row])


def test_whole_loop_separation_and_true_loop_read_the_measured_outputs(client):
    sim = _simulate(client, _body()).json()
    aa, _, cza, cya = _augmented()
    gain = _kalman(aa, cya)
    kh, fx, fu = _horizon_gain(aa, cza)
    kx, ku = kh @ fx, kh @ fu  # the target is the setpoint, so no disturbance correction (Z_d = 0)
    estimator = np.linalg.eigvals((np.eye(3) - gain @ cya) @ aa)
    assert _match(sim["estimator"]["poles"], estimator) < 1e-8
    whole = np.linalg.eigvals(_loop_matrix(A, B, CM, gain, kx, ku))
    assert _match(sim["whole_loop"]["poles"], whole) < 1e-7
    # separation (common practice): the whole loop's poles are the controller's and the estimator's
    controller = np.linalg.eigvals(np.block([[A - B @ kx[:, :2], B @ (np.eye(1) - ku)], [-kx[:, :2], np.eye(1) - ku]]))
    assert _match(sim["whole_loop"]["poles"], np.concatenate([controller, estimator])) < 1e-6
    true = np.linalg.eigvals(_loop_matrix(A, 1.2 * B, CM, gain, kx, ku))
    assert _match(sim["true_loop"]["poles"], true) < 1e-7
    # the true loop differs from the whole loop: the gain error moves the poles
    assert _match(sim["true_loop"]["poles"], whole) > 1e-3


# --------------------------------------------------------------------------- /design/export


def _export(client, body, format_="state_space"):
    fields = {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator", "limits") if k in body}
    r = client.post("/design/export", json={**fields, "format": format_})
    assert r.status_code == 200, r.text
    return r


def _dlsim(law, w):
    system = tuple(np.array(law[k]["values"], dtype=float) for k in "abcd")
    _, v, _ = scipy.signal.dlsim((*system, law["sample_time"]), w)  # scipy's LTI simulation
    return v


@pytest.mark.parametrize("terminal", ["none", "riccati"])
def test_the_exported_law_reads_the_measured_outputs_and_gives_simulate_s_inputs(client, terminal):
    body = _body()
    body["weights"]["terminal"] = terminal
    sim = _simulate(client, body).json()
    law = _export(client, body).json()
    assert [(s["name"], s["role"]) for s in law["inputs"]] == [
        ("outlet_temp.measured", "measured"),
        ("inlet_temp.setpoint", "setpoint"),
    ]
    assert law["prediction"]["rows"] == ["outlet_temp.measured"]
    assert "heater.input_disturbance" in law["states"]
    w = np.hstack([np.array(sim["measured"]), np.array(sim["setpoints"])])
    u = np.array(sim["inputs"])
    v = _dlsim(law, w)
    np.testing.assert_allclose(v[:, :1], u, rtol=0, atol=1e-9 * np.abs(u).max())


def test_the_full_state_law_reads_the_plant_states(client):
    body = _body(noise=False, d_measured=[[0.2]])  # full_state reads the state: a feed-through plays no part
    body["estimator"] = {"kind": "full_state"}
    sim = _simulate(client, body).json()
    law = _export(client, body).json()
    assert [(s["name"], s["role"]) for s in law["inputs"]] == [
        ("x1.measured", "measured_state"),
        ("x2.measured", "measured_state"),
        ("inlet_temp.setpoint", "setpoint"),
    ]
    states = np.array(sim["estimates"])  # full_state: the true plant's state, what the law reads
    w = np.hstack([states, np.array(sim["setpoints"])])
    u = np.array(sim["inputs"])
    v = _dlsim(law, w)
    np.testing.assert_allclose(v[:, :1], u, rtol=0, atol=1e-9 * np.abs(u).max())
    # the law is the textbook state feedback du = Kr r - Kx x - Ku u(k-1) on the measured state
    kh, fx, fu = _horizon_gain(A, CZ)
    d = np.array(law["d"]["values"])
    np.testing.assert_allclose(d[0, :2], -(kh @ fx)[0], rtol=1e-9, atol=1e-12)


def test_the_structured_text_reads_the_measured_outputs(client):
    body = _body()
    sim = _simulate(client, body).json()
    block = FunctionBlock(_export(client, body, "structured_text").text)
    assert block.names("input") == ["OUTLET_TEMP", "OUTLET_TEMP_OK", "INLET_TEMP_SP", "RESET"]
    u = np.array(sim["inputs"])[:, 0]
    got = [
        block.call(OUTLET_TEMP=float(y[0]), INLET_TEMP_SP=float(r[0]))["HEATER"]
        for y, r in zip(sim["measured"], sim["setpoints"], strict=True)
    ]
    np.testing.assert_allclose(got, u, rtol=0, atol=1e-9 * np.abs(u).max())


# --------------------------------------------------------------------------- what is refused


def test_the_export_refuses_a_measured_feed_through_and_says_why(client):
    body = _body(d_measured=[[0.2]])
    fields = {k: body[k] for k in ("model", "horizons", "weights", "estimator")}
    found = invalid_fields(client, "/design/export", {**fields, "format": "state_space"})
    assert "algebraic loop" in found["/model/d_measured/0"]


@pytest.mark.parametrize("kind", ["kalman", "full_state"])
def test_the_export_refuses_an_operating_point_it_has_no_values_for(client, kind):
    # with operating_point.measured the sensors' law is exported: tests/api/test_measured_operating_point.py
    body = _body()
    fields = {k: body[k] for k in ("model", "horizons", "weights", "estimator")}
    fields["model"]["operating_point"] = {"inputs": [1.0], "outputs": [20.0]}
    if kind == "full_state":  # the states have no operating values even when the outputs are measured
        fields["model"].pop("c_measured")
        fields["model"].pop("measured")
        fields["estimator"] = {"kind": "full_state"}
    found = invalid_fields(client, "/design/export", {**fields, "format": "state_space"})
    if kind == "full_state":
        assert "gives no values" in found["/model/operating_point"]
    else:
        assert "operating_point.measured" in found["/model/operating_point/measured"]


@pytest.mark.parametrize(
    "edit,pointer",
    [
        (lambda b: b["scenario"]["true_plant"].update(d_measured=[[0.1]]), "/scenario/true_plant/d_measured"),
        (
            lambda b: b["scenario"]["true_plant"].update(c_measured=[[0.0, 1.0], [1.0, 0.0]], measured=None),
            "/scenario/true_plant/c_measured",
        ),
        (lambda b: b["scenario"]["measurement_noise"].update(std=[0.1, 0.1]), "/scenario/measurement_noise/std"),
        (lambda b: b["estimator"].update(measurement_noise=[0.1, 0.1]), "/estimator/measurement_noise"),
        (
            lambda b: b["model"].update(operating_point={"inputs": [1.0], "outputs": [20.0]}),
            "/model/operating_point/measured",
        ),
    ],
)
def test_simulate_names_what_does_not_fit_the_measured_outputs(client, edit, pointer):
    body = _body()
    edit(body)
    assert pointer in invalid_fields(client, "/simulate", body)


def test_the_run_size_cap_counts_the_measured_outputs(client):
    from service.pipeline.caps import Caps, plant_run_entries
    from service.pipeline.plant import require_plant
    from service.schemas.model import StateSpaceModel

    body = _body()
    for model in (body["model"], body["scenario"]["true_plant"]):  # three sensors, one controlled output
        model["c_measured"] = [[0.0, 1.0], [1.0, 1.0], [0.5, 0.0]]
        model.pop("measured")
    body["estimator"] = {"kind": "input_disturbance"}
    body["scenario"]["measurement_noise"]["std"] = [0.01, 0.01, 0.01]
    sim = _simulate(client, body).json()
    assert np.array(sim["measured"]).shape == (body["scenario"]["steps"], 3)
    assert sim["columns"]["measured"] == ["y1", "y2", "y3"]
    plant = require_plant(StateSpaceModel.model_validate(body["model"]), Caps())
    kept = sum(np.array(sim[k]).size for k in ("outputs", "setpoints", "measured", "inputs", "estimates"))
    true_states = 2 * body["scenario"]["steps"]  # the true plant's states, kept but not answered
    # the cap's count is what the run keeps: every series answered plus the true states (its docstring)
    assert plant_run_entries(plant, true_plant=plant, disturbance="input", steps=body["scenario"]["steps"]) == (
        kept + true_states
    )


def test_the_bundled_example_with_a_sensor_of_its_own(client):
    from service.pipeline.examples import load_example

    body = load_example("simulate_request_measured.json")
    sim = _simulate(client, body).json()
    assert sim["columns"]["measured"] == ["outlet_temp"] and sim["columns"]["outputs"] == ["inlet_temp"]
    z = np.array(sim["outputs"])[-30:, 0]
    # noise of std 0.01 on the sensor only; the unmeasured inlet temperature still settles on 1
    # to within a few noise spreads (common practice: the filter averages the noise down)
    assert abs(z.mean() - 1.0) < 0.02
