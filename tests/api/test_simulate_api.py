"""POST /simulate through the HTTP layer: the law by hand, offset-free runs, CSV, errors.

Sources named beside each check: the control law of the design notes
``du(k) = Kr r - Kx x(k) - Ku u(k-1) [- Kd d(k)]``; the offset-free conditions of Muske and
Badgwell 2002 and Pannocchia and Rawlings 2003; the steady-state Kalman filter from
``scipy.linalg.solve_discrete_are`` with ``L = P C' (C P C' + R)^-1`` (Kalman 1960); the
separation principle (common practice); the change of units behind scaling (common
practice); RFC 4180 for CSV.
"""

from __future__ import annotations

import copy
import csv
import io
import json

import numpy as np
import pytest
import scipy.linalg

from service.api.routes.simulate import prefers_csv
from service.pipeline.examples import load_example

# The example vessel (invented numbers, openapi/examples/simulate_request.json).
A = np.array(load_example("simulate_request.json")["model"]["a"])
B = np.array(load_example("simulate_request.json")["model"]["b"])
C = np.array(load_example("simulate_request.json")["model"]["c"])


@pytest.fixture
def request_body():
    """A fresh copy of the bundled /simulate example."""
    return copy.deepcopy(load_example("simulate_request.json"))


def plain_request(steps=300, kind="output_disturbance", **scenario):
    """The example plant without tags, mismatch or noise, plus the given scenario fields."""
    body = copy.deepcopy(load_example("simulate_request.json"))
    for key in ("inputs", "outputs"):
        body["model"].pop(key)
    body["estimator"] = {"kind": kind}
    body["scenario"] = {"steps": steps, **scenario}
    return body


def post(client, body, **headers):
    r = client.post("/simulate", json=body, headers=headers)
    assert r.status_code == 200, r.text
    return r


def problem(client, body, status=422):
    r = client.post("/simulate", json=body)
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "Traceback" not in r.text
    return r.json()


def pointers(client, body):
    return [e["pointer"] for e in problem(client, body)["errors"]]


MISMATCH = {
    "kind": "state_space",
    "a": (A * [[1.01], [1.01], [1.0], [1.02]]).tolist(),
    "b": (B * 1.15).tolist(),
    "c": C.tolist(),
    "sample_time": 1.0,
}
EVENTS = {
    "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}, {"step": 250, "setpoint": [0.4, 0.3]}],
    "input_disturbances": [{"step": 60, "value": [0.1, -0.05]}],
    "output_disturbances": [{"step": 120, "value": [0.3, 0.2]}],
}


def test_the_example_posts_and_answers_every_block(client, request_body):
    body = post(client, request_body).json()
    steps = request_body["scenario"]["steps"]
    assert body["steps"] == steps and body["diverged_at"] is None
    assert body["time"] == [float(k) for k in range(steps)]
    for key, width in (("outputs", 2), ("measured", 2), ("setpoints", 2), ("inputs", 2), ("estimates", 6)):
        assert np.array(body[key]).shape == (steps, width), key
    assert body["columns"]["outputs"] == ["vessel_temperature", "vessel_level"]
    assert body["columns"]["inputs"] == ["steam_valve", "outlet_valve"]
    assert body["columns"]["estimates"][-2:] == [
        "vessel_temperature.output_disturbance",
        "vessel_level.output_disturbance",
    ]
    assert [f["name"] for f in body["performance"]["outputs"]] == body["columns"]["outputs"]
    assert [f["name"] for f in body["performance"]["inputs"]] == body["columns"]["inputs"]
    assert body["estimator"]["kind"] == "output_disturbance" and body["whole_loop"]["stable"] is True
    assert body["fingerprint"].startswith("sha256:") and "management-of-change" in body["advisory"]
    # The design block is what POST /design answers for the same design fields.
    design_only = {k: request_body[k] for k in ("model", "horizons", "weights", "estimator")}
    assert body["design"] == client.post("/design", json=design_only).json()
    # final offset is setpoint minus output at the last step, engineering units
    offsets = [f["final_offset"] for f in body["performance"]["outputs"]]
    np.testing.assert_allclose(offsets, np.subtract(body["setpoints"][-1], body["outputs"][-1]), rtol=1e-12)


def test_full_state_without_mismatch_applies_the_design_gains_by_hand(client):
    # The law of the design notes, du = Kr r - Kx x - Ku u(k-1), in engineering units with
    # the gains the response reports; spans on every signal exercise the unscaling too.
    body = plain_request(
        steps=300,
        kind="full_state",
        initial={"state": [0.2, -0.1, 0.05, 0.0], "input": [0.1, 0.0]},
        measurement_noise={"std": [0.05, 0.05], "seed": 4},
        **EVENTS,
    )
    body["model"]["inputs"] = [{"name": "steam", "span": 20.0}, {"name": "outlet", "span": 5.0}]
    body["model"]["outputs"] = [{"name": "temperature", "span": 4.0}, {"name": "level", "span": 0.5}]
    answer = post(client, body).json()
    gain = answer["design"]["gain"]
    kr, kx, ku = (np.array(gain[k]) for k in ("setpoint", "state", "previous_input"))
    x, u = np.array([0.2, -0.1, 0.05, 0.0]), np.array([0.1, 0.0])
    d_in, d_out, r = np.zeros(2), np.zeros(2), C @ x
    inputs, outputs, states = [], [], []
    for k in range(300):
        r = {5: np.array([1.0, -0.5]), 250: np.array([0.4, 0.3])}.get(k, r)
        d_in = {60: np.array([0.1, -0.05])}.get(k, d_in)
        d_out = {120: np.array([0.3, 0.2])}.get(k, d_out)
        outputs.append(C @ x + d_out)
        states.append(x)
        u = u + kr @ r - kx @ x - ku @ u
        inputs.append(u)
        x = A @ x + B @ (u + d_in)
    np.testing.assert_allclose(answer["inputs"], inputs, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(answer["outputs"], outputs, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(answer["estimates"], states, rtol=1e-9, atol=1e-12)  # the state itself
    assert answer["columns"]["estimates"] == ["x1", "x2", "x3", "x4"]
    assert answer["estimator"]["gain"] is None and answer["estimator"]["poles"] == []


@pytest.mark.parametrize(
    "estimator",
    [
        {"kind": "output_disturbance"},
        {"kind": "input_disturbance"},
        {"kind": "kalman", "disturbance": "output", "process_noise": [0.1] * 4, "measurement_noise": [0.2, 0.2]},
        {"kind": "kalman", "disturbance": "input", "disturbance_noise": [0.5, 0.5]},
    ],
)
def test_disturbance_models_end_on_the_setpoint_under_mismatch(client, estimator):
    # Offset-free conditions (Muske and Badgwell 2002; Pannocchia and Rawlings 2003): nd = p
    # disturbances, a detectable augmented model and a stable loop remove the offset under
    # any mismatch and step disturbances.
    body = plain_request(steps=900, true_plant=MISMATCH, **EVENTS)
    body["estimator"] = estimator
    answer = post(client, body).json()
    assert answer["diverged_at"] is None
    for figures in answer["performance"]["outputs"]:
        assert abs(figures["final_offset"]) < 1e-6, figures
    assert np.abs(np.subtract(answer["outputs"][-1], answer["setpoints"][-1])).max() < 1e-6


def test_full_state_under_mismatch_leaves_the_classic_offset(client):
    # Without a disturbance model the loop settles off the setpoint (common practice).
    answer = post(client, plain_request(steps=900, kind="full_state", true_plant=MISMATCH, **EVENTS)).json()
    tail = np.subtract(answer["outputs"][-50:], answer["setpoints"][-50:])
    assert np.ptp(tail, axis=0).max() < 1e-6  # settled ...
    assert max(abs(f["final_offset"]) for f in answer["performance"]["outputs"]) > 1e-3  # ... off the setpoint


def test_a_filter_without_a_disturbance_model_leaves_an_offset_and_says_so(client):
    # Offset-free control needs a disturbance model (Muske and Badgwell 2002; Pannocchia and
    # Rawlings 2003). A Kalman filter with disturbance 'none' under mismatch and step
    # disturbances settles off the setpoint; the answer had said nothing of it (found in an
    # audit of the estimator). With per_output the same run is offset-free and not warned.
    body = plain_request(steps=900, true_plant=MISMATCH, **EVENTS)
    body["estimator"] = {"kind": "kalman", "disturbance": "none"}
    answer = post(client, body).json()
    codes = [w["code"] for w in answer["warnings"]]
    assert "no_disturbance_model" in codes
    assert max(abs(f["final_offset"]) for f in answer["performance"]["outputs"]) > 1e-3
    body["estimator"] = {"kind": "kalman", "disturbance": "per_output"}
    answer = post(client, body).json()
    assert "no_disturbance_model" not in [w["code"] for w in answer["warnings"]]
    assert max(abs(f["final_offset"]) for f in answer["performance"]["outputs"]) < 1e-6
    # full_state reads the states and models no disturbance either: under the same mismatch it
    # settles off the setpoint too, and says so (found in a field-layout audit: it had been silent)
    body["estimator"] = {"kind": "full_state"}
    answer = post(client, body).json()
    assert "no_disturbance_model" in [w["code"] for w in answer["warnings"]]
    assert max(abs(f["final_offset"]) for f in answer["performance"]["outputs"]) > 1e-3


def test_the_kalman_gain_is_the_riccati_one_for_the_posted_covariances(client):
    # Reference: scipy.linalg.solve_discrete_are on the dual pair (A', C'), L = P C' S^-1,
    # S = C P C' + R (steady-state Kalman filter, current-estimator form; Kalman 1960).
    qx = np.diag([0.02, 0.01, 0.03, 0.01]) + 0.004
    qd = np.array([[0.5, 0.1], [0.1, 0.3]])
    rv = np.array([[0.04, 0.01], [0.01, 0.09]])
    body = plain_request(steps=20)
    body["estimator"] = {
        "kind": "kalman",
        "disturbance": "output",
        "process_noise": qx.tolist(),
        "disturbance_noise": qd.tolist(),
        "measurement_noise": rv.tolist(),
    }
    answer = post(client, body).json()
    a_aug = scipy.linalg.block_diag(A, np.eye(2))
    c_aug = np.hstack([C, np.eye(2)])
    p = scipy.linalg.solve_discrete_are(a_aug.T, c_aug.T, scipy.linalg.block_diag(qx, qd), rv)
    s = c_aug @ p @ c_aug.T + rv
    gain = p @ c_aug.T @ np.linalg.inv(s)
    np.testing.assert_allclose(answer["estimator"]["gain"]["values"], gain, rtol=1e-8, atol=1e-12)
    poles = np.linalg.eigvals((np.eye(6) - gain @ c_aug) @ a_aug)
    reported = [complex(z["real"], z["imag"]) for z in answer["estimator"]["poles"]]
    np.testing.assert_allclose(np.sort_complex(reported), np.sort_complex(poles), atol=1e-9)
    assert answer["estimator"]["gain"]["columns"] == ["z1", "z2"]


@pytest.mark.parametrize("kind", ["full_state", "output_disturbance", "input_disturbance", "kalman"])
def test_whole_loop_poles_are_controller_poles_and_estimator_poles(client, kind):
    # Separation principle (common practice): the loop's poles are the union of both sets.
    answer = post(client, plain_request(steps=10, kind=kind)).json()
    loop = answer["whole_loop"]

    def as_complex(poles):
        return np.sort_complex([complex(z["real"], z["imag"]) for z in poles])

    assert loop["controller_poles"] == answer["design"]["closed_loop"]["poles"]
    assert loop["estimator_poles"] == answer["estimator"]["poles"]
    union = as_complex(loop["controller_poles"] + loop["estimator_poles"])
    np.testing.assert_allclose(as_complex(loop["poles"]), union, atol=1e-7)
    assert loop["separation_holds"] is True and len(loop["poles"]) == 6 + 6 * (kind != "full_state")


def test_spans_give_the_run_of_weights_divided_by_span_squared(client):
    # Change of units (common practice): a design on z/span and u/span with Q, R is the design
    # on z and u with Q/span^2, R/span^2; with covariances given in engineering units the
    # filter is the same too, so the runs agree in engineering units.
    spans_u, spans_z = [50.0, 4.0], [10.0, 0.5]
    plain = plain_request(
        steps=400,
        true_plant=MISMATCH,
        measurement_noise={"std": [0.02, 0.01], "seed": 9},
        initial={"input": [0.5, -0.2], "setpoint": [0.1, 0.0]},
        **EVENTS,
    )
    plain["estimator"] = {
        "kind": "kalman",
        "disturbance": "input",
        "process_noise": [0.01, 0.02, 0.01, 0.02],
        "disturbance_noise": [[0.3, 0.05], [0.05, 0.2]],
        "measurement_noise": [0.04, 0.01],
    }
    scaled = copy.deepcopy(plain)
    scaled["model"]["inputs"] = [{"name": "u1", "span": spans_u[0]}, {"name": "u2", "span": spans_u[1]}]
    scaled["model"]["outputs"] = [{"name": "z1", "span": spans_z[0]}, {"name": "z2", "span": spans_z[1]}]
    plain["weights"] = {
        "output": [q / s**2 for q, s in zip(plain["weights"]["output"], spans_z, strict=True)],
        "move": [r / s**2 for r, s in zip(plain["weights"]["move"], spans_u, strict=True)],
    }
    one, two = post(client, scaled).json(), post(client, plain).json()
    for key in ("outputs", "measured", "setpoints", "inputs", "estimates"):
        np.testing.assert_allclose(one[key], two[key], rtol=1e-7, atol=1e-10, err_msg=key)
    np.testing.assert_allclose(
        one["estimator"]["gain"]["values"], two["estimator"]["gain"]["values"], rtol=1e-7, atol=1e-12
    )
    for f, g in zip(one["performance"]["outputs"], two["performance"]["outputs"], strict=True):
        assert f["final_offset"] == pytest.approx(g["final_offset"], rel=1e-6, abs=1e-9)


def test_measured_disturbances_are_fed_forward_through_kd(client):
    # The law with feed-forward, du = Kr r - Kx x - Ku u(k-1) - Kd d(k), with the Kd the
    # design reports (full state, no mismatch).
    bd = [[0.05], [0.0], [0.02], [0.0]]
    body = plain_request(
        steps=150,
        kind="full_state",
        setpoint_changes=[{"step": 5, "setpoint": [1.0, -0.5]}],
        measured_disturbances=[{"step": 40, "value": [2.0]}, {"step": 100, "value": [-1.0]}],
    )
    body["model"]["b_disturbance"] = bd
    body["model"]["disturbances"] = [{"name": "inlet_flow", "unit": "t/h", "span": 4.0}]
    answer = post(client, body).json()
    gain = answer["design"]["gain"]
    kr, kx, ku, kd = (np.array(gain[k]) for k in ("setpoint", "state", "previous_input", "disturbance"))
    x, u, d, r = np.zeros(4), np.zeros(2), np.zeros(1), np.zeros(2)
    inputs = []
    for k in range(150):
        r = {5: np.array([1.0, -0.5])}.get(k, r)
        d = {40: np.array([2.0]), 100: np.array([-1.0])}.get(k, d)
        u = u + kr @ r - kx @ x - ku @ u - kd @ d
        inputs.append(u)
        x = A @ x + B @ u + np.array(bd) @ d
    np.testing.assert_allclose(answer["inputs"], inputs, rtol=1e-9, atol=1e-12)
    assert answer["columns"]["measured_disturbances"] == ["inlet_flow"]
    assert answer["measured_disturbances"][40] == [2.0]


def test_a_true_plant_with_a_longer_dead_time_and_more_states_is_still_offset_free(client):
    # Transfer-matrix model and true plant (invented numbers); the true dead times are longer,
    # so the true plant has more states. Offset-free conditions as above.
    def element(gain, tau, dead):
        return {"gain": gain, "time_constants": [tau], "dead_time": dead}

    model = {
        "kind": "transfer_matrix",
        "sample_time": 1.0,
        "elements": [
            [element(2.0, 8.0, 1.0), element(0.5, 5.0, 2.0)],
            [element(-0.4, 6.0, 1.0), element(1.5, 4.0, 1.0)],
        ],
    }
    true = copy.deepcopy(model)
    true["elements"][0][0] = element(2.3, 9.0, 3.0)
    true["elements"][1][1] = element(1.3, 4.5, 2.0)
    body = {
        "model": model,
        "horizons": {"prediction": 40, "control": 4},
        "weights": {"output": [1.0, 1.0], "move": [1.0, 1.0]},
        "scenario": {"steps": 600, "true_plant": true, **EVENTS},
    }
    answer = post(client, body).json()
    assert answer["diverged_at"] is None
    assert max(abs(f["final_offset"]) for f in answer["performance"]["outputs"]) < 1e-6


def test_a_run_that_blows_up_is_cut_and_reported(client):
    true = dict(MISMATCH, b=(-3.0 * B).tolist())
    r = post(
        client,
        plain_request(
            steps=5000, kind="full_state", true_plant=true, setpoint_changes=[{"step": 0, "setpoint": [1.0, 1.0]}]
        ),
    )
    assert "NaN" not in r.text and "Infinity" not in r.text
    answer = r.json()
    cut = answer["diverged_at"]
    assert cut is not None and 0 < cut < 5000
    assert len(answer["time"]) == len(answer["outputs"]) == len(answer["inputs"]) == cut
    assert "run_diverged" in [w["code"] for w in answer["warnings"]]
    assert all(f["final_offset"] is None for f in answer["performance"]["outputs"])
    csv_rows = post(
        client,
        plain_request(
            steps=5000, kind="full_state", true_plant=true, setpoint_changes=[{"step": 0, "setpoint": [1.0, 1.0]}]
        ),
        accept="text/csv",
    ).text.splitlines()
    assert len(csv_rows) == cut + 1


def test_csv_has_a_header_of_tag_names_and_one_row_per_step(client, request_body):
    r = post(client, request_body, accept="text/csv")
    assert r.headers["content-type"].startswith("text/csv")
    assert r.content.count(b"\r\n") == request_body["scenario"]["steps"] + 1  # RFC 4180 line ends
    rows = list(csv.reader(io.StringIO(r.text)))
    assert rows[0] == [
        "time",
        "vessel_temperature",
        "vessel_level",
        "vessel_temperature.setpoint",
        "vessel_level.setpoint",
        "steam_valve",
        "outlet_valve",
    ]
    assert len(rows) == request_body["scenario"]["steps"] + 1
    answer = post(client, request_body).json()
    values = np.array(rows[1:], dtype=float)
    # the numbers read back exactly (shortest round-trip form)
    np.testing.assert_array_equal(values[:, 0], answer["time"])
    np.testing.assert_array_equal(values[:, 1:3], answer["outputs"])
    np.testing.assert_array_equal(values[:, 3:5], answer["setpoints"])
    np.testing.assert_array_equal(values[:, 5:], answer["inputs"])


def test_same_request_same_bytes(client, request_body):
    assert post(client, request_body).content == post(client, request_body).content
    assert (
        post(client, request_body, accept="text/csv").content == post(client, request_body, accept="text/csv").content
    )
    other = copy.deepcopy(request_body)
    other["scenario"]["measurement_noise"]["seed"] = 2
    one, two = post(client, request_body).json(), post(client, other).json()
    assert one["outputs"] != two["outputs"] and one["fingerprint"] != two["fingerprint"]


@pytest.mark.parametrize(
    ("accept", "csv_wanted"),
    [
        (None, False),
        ("application/json", False),
        ("text/csv", True),
        ("text/csv; charset=utf-8", True),
        ("*/*", False),
        ("text/csv, */*", True),
        ("text/csv;q=0.5, application/json", False),
        ("application/json;q=0.2, text/*", True),
        ("text/csv;q=0", False),
        ("text/csv;q=oops", False),
        ("text/html", False),
    ],
)
def test_accept_header_chooses_csv_only_when_preferred(accept, csv_wanted):
    # RFC 9110, section 12.5.1: quality values, the most specific matching range decides.
    assert prefers_csv(accept) is csv_wanted


def _edit(path, value):
    """An edit that sets body[path...] = value (lists and dicts by index or key)."""

    def edit(body):
        target = body
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value

    return edit


@pytest.mark.parametrize(
    ("edit", "pointer"),
    [
        (
            _edit(("scenario", "setpoint_changes"), [{"step": 300, "setpoint": [1.0, 0.0]}]),
            "/scenario/setpoint_changes/0/step",
        ),
        (
            _edit(("scenario", "setpoint_changes"), [{"step": -1, "setpoint": [1.0, 0.0]}]),
            "/scenario/setpoint_changes/0/step",
        ),
        (
            _edit(("scenario", "setpoint_changes"), [{"step": 3, "setpoint": [1.0]}]),
            "/scenario/setpoint_changes/0/setpoint",
        ),
        (
            _edit(("scenario", "output_disturbances"), [{"step": 3, "value": [1.0, 2.0, 3.0]}]),
            "/scenario/output_disturbances/0/value",
        ),
        (
            _edit(
                ("scenario", "input_disturbances"), [{"step": 1, "value": [1.0]}, {"step": 240, "value": [1.0, 0.0]}]
            ),
            "/scenario/input_disturbances/0/value",
        ),
        (
            _edit(
                ("scenario", "input_disturbances"), [{"step": 1, "value": [1.0]}, {"step": 240, "value": [1.0, 0.0]}]
            ),
            "/scenario/input_disturbances/1/step",
        ),
        (
            _edit(("scenario", "measured_disturbances"), [{"step": 1, "value": [1.0]}]),
            "/scenario/measured_disturbances",
        ),
        (_edit(("scenario", "measurement_noise"), {"std": [0.1, -0.1]}), "/scenario/measurement_noise/std/1"),
        (_edit(("scenario", "measurement_noise"), {"std": [0.1]}), "/scenario/measurement_noise/std"),
        (_edit(("scenario", "measurement_noise"), {"std": [0.1, 0.1], "seed": -3}), "/scenario/measurement_noise/seed"),
        (_edit(("scenario", "steps"), 0), "/scenario/steps"),
        (_edit(("scenario", "steps"), 100_001), "/scenario/steps"),
        (_edit(("scenario", "steps"), 2.5), "/scenario/steps"),
        (_edit(("scenario", "stpes"), 10), "/scenario/stpes"),
        (_edit(("scenario", "initial"), {"state": [0.0]}), "/scenario/initial/state"),
        (_edit(("scenario", "initial"), {"input": [0.0, 0.0, 0.0]}), "/scenario/initial/input"),
        (_edit(("scenario", "initial"), {"setpoint": [0.0]}), "/scenario/initial/setpoint"),
        (_edit(("scenario", "true_plant", "b"), [[0.1]] * 4), "/scenario/true_plant"),
        (_edit(("scenario", "true_plant", "c"), [[1.0, 0.0, 0.0, 0.0]]), "/scenario/true_plant"),
        (_edit(("scenario", "true_plant", "a"), [[0.5, 0.1]]), "/scenario/true_plant/a"),
        (_edit(("scenario", "true_plant", "sample_time"), 2.0), "/scenario/true_plant/sample_time"),
        (
            _edit(("scenario", "true_plant", "inputs"), [{"name": "outlet_valve"}, {"name": "steam_valve"}]),
            "/scenario/true_plant/inputs/0/name",
        ),
        (_edit(("scenario", "true_plant", "c_measured"), [[1.0, 0.0, 0.0, 0.0]]), "/scenario/true_plant/c_measured"),
        (_edit(("scenario", "true_plant", "kind"), "mystery"), "/scenario/true_plant/kind"),
        # measured outputs of their own: the true plant must measure as many, with the model's feed-through
        (_edit(("model", "c_measured"), [[1.0, 0.0, 0.0, 0.0]]), "/scenario/true_plant/c"),
        (_edit(("model", "d_measured"), [[0.0, 1.0], [0.0, 0.0]]), "/scenario/true_plant/d_measured"),
        (_edit(("estimator",), {"kind": "output_disturbance", "disturbance": "input"}), "/estimator/disturbance"),
        (_edit(("estimator",), {"kind": "kalman", "disturbance": "sideways"}), "/estimator/disturbance"),
        (_edit(("estimator",), {"kind": "observer"}), "/estimator/kind"),
        (
            _edit(("estimator",), {"kind": "full_state", "measurement_noise": [1.0, 1.0]}),
            "/estimator/measurement_noise",
        ),
        (_edit(("estimator",), {"kind": "kalman", "process_noise": [1.0, 1.0]}), "/estimator/process_noise"),
        (
            _edit(("estimator",), {"kind": "kalman", "process_noise": [1.0, 1.0, -1.0, 1.0]}),
            "/estimator/process_noise/2",
        ),
        (
            _edit(("estimator",), {"kind": "kalman", "disturbance_noise": [[1.0, 2.0], [2.0, 1.0]]}),
            "/estimator/disturbance_noise",
        ),
        (
            _edit(("estimator",), {"kind": "kalman", "disturbance": "none", "disturbance_noise": [1.0]}),
            "/estimator/disturbance_noise",
        ),
        (_edit(("estimator",), {"kind": "kalman", "measurement_noise": [1.0, 0.0]}), "/estimator/measurement_noise/1"),
        (
            _edit(("estimator",), {"kind": "kalman", "measurement_noise": [[1.0, 1.0], [1.0, 1.0]]}),
            "/estimator/measurement_noise",
        ),
        (_edit(("horizons", "control"), 50), "/horizons/control"),
    ],
)
def test_bad_input_is_a_422_naming_the_field(client, request_body, edit, pointer):
    edit(request_body)
    assert pointer in pointers(client, request_body)


def test_design_and_scenario_problems_come_back_together(client, request_body):
    request_body["weights"]["output"] = [1.0]
    request_body["scenario"]["setpoint_changes"][0]["step"] = 999
    assert {"/weights/output", "/scenario/setpoint_changes/0/step"} <= set(pointers(client, request_body))


def test_a_true_plant_of_another_state_count_needs_no_initial_state(client, request_body):
    request_body["scenario"]["true_plant"] = {
        "kind": "state_space",
        "a": [[0.9, 0.0], [0.0, 0.8]],
        "b": [[0.1, 0.0], [0.0, 0.1]],
        "c": [[1.0, 0.0], [0.0, 1.0]],
        "sample_time": 1.0,
    }
    request_body["scenario"]["initial"] = {"state": [0.0] * 4}
    assert "/scenario/initial/state" in pointers(client, request_body)
    request_body["scenario"]["initial"] = {}
    post(client, request_body)
    request_body["estimator"] = {"kind": "full_state"}
    assert "/scenario/true_plant" in pointers(client, request_body)


def test_an_undetectable_disturbance_model_is_a_numerical_problem(client):
    # Two input disturbances but one measured output: more disturbances than outputs cannot
    # be estimated (Pannocchia and Rawlings 2003, rank condition).
    body = plain_request(steps=10, kind="input_disturbance")
    body["model"]["c"] = [[1.0, 0.0, 0.0, 0.0]]
    body["weights"]["output"] = [1.0]
    answer = problem(client, body)
    assert answer["type"] == "urn:movecast:problem:numerical-problem"
    assert answer["errors"][0]["pointer"] == "/estimator/kind"


def test_the_work_cap_refuses_long_runs_of_large_loops(make_client, request_body):
    client = make_client(max_simulation_work=50_000_000)
    request_body["scenario"]["steps"] = 2000
    r = client.post("/simulate", json=request_body)
    assert r.status_code == 422
    error = r.json()["errors"][0]
    assert error["pointer"] == "/scenario/steps" and "floating-point operations" in error["detail"]
    request_body["scenario"]["steps"] = 1000
    assert client.post("/simulate", json=request_body).status_code == 200
    capped = make_client(max_simulation_steps=100)
    assert capped.post("/simulate", json=request_body).json()["errors"][0]["pointer"] == "/scenario/steps"


def test_the_cli_simulates_the_example_and_prints_csv(capsys, client, request_body):
    from service.cli import main

    assert main(["simulate"]) == 0
    assert json.loads(capsys.readouterr().out) == post(client, request_body).json()
    assert main(["simulate", "--csv"]) == 0
    assert capsys.readouterr().out == post(client, request_body, accept="text/csv").text


def test_figures_are_in_the_model_s_time_unit(client):
    # time[k] = k x sample_time (the definition of a sampled run): the same discrete model at
    # twice the sample time gives the same series on a time axis twice as long, so every
    # time figure and the integral absolute error double.
    one = plain_request(steps=400, true_plant=MISMATCH, **EVENTS)
    two = copy.deepcopy(one)
    two["model"]["sample_time"] = two["scenario"]["true_plant"]["sample_time"] = 2.0
    a, b = post(client, one).json(), post(client, two).json()
    assert b["time"] == [2.0 * t for t in a["time"]] and b["outputs"] == a["outputs"]
    for f, g in zip(a["performance"]["outputs"], b["performance"]["outputs"], strict=True):
        for key in ("rise_time", "settling_time", "integral_absolute_error"):
            assert g[key] == pytest.approx(2.0 * f[key], rel=1e-12), key
        assert g["overshoot_percent"] == pytest.approx(f["overshoot_percent"], rel=1e-12)
    assert a["performance"]["inputs"] == b["performance"]["inputs"]


@pytest.mark.parametrize(
    "edit",
    [
        _edit(("scenario", "setpoint_changes"), [{"step": 10, "setpoint": [1e308, -1e308]}]),
        _edit(("scenario", "measurement_noise"), {"std": [1e308, 1e308]}),
        _edit(("scenario", "initial"), {"input": [1e308, 1e308]}),
        _edit(("scenario", "output_disturbances"), [{"step": 120, "value": [1e308, 1e308]}]),
    ],
)
def test_absurd_levels_overflow_into_a_cut_run_not_a_server_error(client, request_body, edit):
    edit(request_body)
    r = post(client, request_body)
    assert "NaN" not in r.text and "Infinity" not in r.text
    answer = r.json()
    assert answer["diverged_at"] is not None and len(answer["outputs"]) == answer["diverged_at"]


@pytest.mark.parametrize("entry", [("c", 1, 0), ("b", 1, 0)])
@pytest.mark.parametrize("value", [1e308, -1e308, 1e200])
def test_a_true_plant_whose_loop_overflows_is_a_422_naming_it(client, request_body, entry, value):
    # Found in an audit of hostile input: an entry of 1e308 in C of the true plant made the
    # matrix of the loop on it overflow, and its eigenvalue problem was a 500; in B the loop was
    # answered "stable" with a spectral radius of 3e-17 (its eigenvalues noise) while the run
    # blew up at its first step.
    matrix, i, j = entry
    request_body["scenario"]["true_plant"][matrix][i][j] = value
    assert pointers(client, request_body) == ["/scenario/true_plant"]


def test_move_blocking_is_simulated_with_the_design_s_gains(client):
    # The law of the design notes with the gains of a blocked design (moves at steps 0, 2, 4).
    body = plain_request(steps=120, kind="full_state", setpoint_changes=[{"step": 5, "setpoint": [1.0, -0.5]}])
    body["horizons"]["move_steps"] = [0, 2, 4]
    answer = post(client, body).json()
    gain = answer["design"]["gain"]
    kr, kx, ku = (np.array(gain[k]) for k in ("setpoint", "state", "previous_input"))
    x, u, r = np.zeros(4), np.zeros(2), np.zeros(2)
    inputs = []
    for k in range(120):
        r = {5: np.array([1.0, -0.5])}.get(k, r)
        u = u + kr @ r - kx @ x - ku @ u
        inputs.append(u)
        x = A @ x + B @ u
    np.testing.assert_allclose(answer["inputs"], inputs, rtol=1e-9, atol=1e-12)


def test_the_answer_is_written_in_the_compute_process_as_the_pipeline_writes_it(client):
    # The serving process sends the bytes the compute process wrote (JSON or CSV), so the
    # answer is exactly the pipeline's response model serialized, and its CSV.
    from service.pipeline.caps import Caps
    from service.pipeline.simulate import run_simulation, simulation_csv
    from service.schemas.simulate import SimulateRequest

    body = load_example("simulate_request.json")
    expected = run_simulation(SimulateRequest.model_validate(body), Caps())
    r = client.post("/simulate", json=body)
    assert r.status_code == 200 and r.headers["content-type"] == "application/json"
    assert r.content == expected.model_dump_json().encode()
    csv_answer = client.post("/simulate", json=body, headers={"Accept": "text/csv"})
    assert csv_answer.headers["content-type"].startswith("text/csv")
    assert csv_answer.text == simulation_csv(expected)
