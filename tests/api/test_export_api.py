"""POST /design/export: the exported law reproduces /simulate's unconstrained run.

References: ``scipy.signal.dlsim`` (scipy's discrete LTI simulation) runs the exported
state-space law on the measurements, setpoints and measured disturbances that /simulate
recorded; its inputs must be /simulate's, step for step (a causal controller fed the same
signals gives the same inputs).  The Structured Text is parsed by a grammar of IEC 61131-3
written for ``lark`` (``tests/api/iec_st.py``; no general-purpose parser that is not tied to
one vendor's product was found on the package index) and interpreted call by call on the
same signals.  RFC 4180 for the CSV tables.  Plants: the bundled example vessel and the
transfer-matrix example (dead times, an integrating level, a measured disturbance, spans),
a layout with more valves than outputs, true plants with 20 % gain error (all invented).
"""

from __future__ import annotations

import copy
import csv
import datetime
import io
import re

import numpy as np
import pytest
import scipy.signal
from lark.exceptions import UnexpectedInput

from service.pipeline.examples import load_example
from tests.api.iec_st import CheckError, FunctionBlock

DESIGN_FIELDS = ("model", "horizons", "weights", "estimator", "limits", "analysis")


def _vessel():
    body = copy.deepcopy(load_example("simulate_request.json"))
    body["scenario"]["steps"] = 200
    return body


def _gain_error(model, factor=1.2):
    true = copy.deepcopy(model)
    for row in true["elements"]:
        for element in row:
            if element is not None:
                element["gain"] *= factor
    for row in true.get("disturbance_elements", []):
        for element in row:
            if element is not None:
                element["gain"] *= factor
    return true


def _transfer_matrix():
    body = copy.deepcopy(load_example("design_request_transfer_matrix.json"))
    body["estimator"] = {"kind": "kalman", "disturbance": "input", "measurement_noise": [0.01, 0.5]}
    body["scenario"] = {
        "steps": 160,
        "setpoint_changes": [{"step": 5, "setpoint": [2.0, -3.0]}],
        "measured_disturbances": [{"step": 50, "value": [5.0]}],
        "input_disturbances": [{"step": 90, "value": [1.0, 0.0]}],
        "measurement_noise": {"std": [0.02, 0.1], "seed": 4},
        "true_plant": _gain_error(body["model"]),
    }
    return body


def _three_valves():
    body = _vessel()
    extra = [0.03, 0.0, 0.04, 0.02]  # a bypass valve moving both temperature and level
    for model, factor in ((body["model"], 1.0), (body["scenario"]["true_plant"], 0.8)):
        model["b"] = [[*row, factor * e] for row, e in zip(model["b"], extra, strict=True)]
    body["model"]["inputs"].append({"name": "bypass_valve", "unit": "%"})
    body["weights"]["move"] = [0.1, 0.1, 0.3]
    body["scenario"]["input_disturbances"] = [{"step": 60, "value": [0.1, 0.0, 0.0]}]
    return body


def _three_valves_with_targets():
    body = _three_valves()
    body["weights"]["input"] = [0.01, 0.02, 0.05]
    body["scenario"]["input_targets"] = [0.0, 0.0, 1.0]
    body["scenario"]["input_target_changes"] = [{"step": 90, "value": [0.2, -0.1, -0.5]}]
    return body


def _three_valves_with_targets_riccati():
    body = _three_valves_with_targets()
    body["weights"]["terminal"] = "riccati"
    body["horizons"] = {"prediction": 10, "control": 10, "first_penalized": 1}
    return body


def _transfer_matrix_bypass_riccati():
    """The transfer matrix with a bypass valve (three valves, two outputs), input targets, the Riccati
    terminal weight, Hu < Hp, Hw = 2 and blocked moves: the measured flow moves the input target
    (found in a review: the exported law and /simulate had both left that out)."""
    body = _transfer_matrix()
    model = body["model"]
    model["elements"][0].append({"gain": 0.5, "time_constants": [6.0], "dead_time": 1.0})
    model["elements"][1].append({"gain": -0.02, "integrating": True, "dead_time": 1.0})
    model["inputs"].append({"name": "bypass_valve", "unit": "%", "span": 50.0})
    body["estimator"] = {"kind": "kalman", "disturbance": "per_output", "measurement_noise": [0.01, 0.5]}
    body["weights"].update({"move": [0.2, 0.2, 0.4], "input": [0.01, 0.02, 0.05], "terminal": "riccati"})
    body["horizons"] = {"prediction": 12, "control": 4, "first_penalized": 2, "move_steps": [0, 1, 3]}
    body["scenario"]["true_plant"] = _gain_error(model)
    body["scenario"]["input_targets"] = [0.0, 0.0, 1.0]
    body["scenario"]["input_target_changes"] = [{"step": 100, "value": [0.5, -0.3, -1.0]}]
    body["scenario"]["input_disturbances"] = [{"step": 90, "value": [1.0, 0.0, 0.0]}]
    return body


def _vessel_riccati():
    body = _vessel()
    body["weights"]["terminal"] = "riccati"
    body["horizons"] = {"prediction": 10, "control": 4, "first_penalized": 1}
    return body


def _transfer_matrix_riccati():
    body = _transfer_matrix()
    body["weights"]["terminal"] = "riccati"
    body["horizons"] = {"prediction": 12, "control": 4}
    return body


CASES = {
    "vessel, 20 % gain error, noise": _vessel,
    "vessel with the Riccati terminal weight": _vessel_riccati,
    "transfer matrix with the Riccati terminal weight": _transfer_matrix_riccati,
    "transfer matrix: dead times, integrating level, measured flow, spans": _transfer_matrix,
    "three valves for two outputs": _three_valves,
    "three valves with input targets": _three_valves_with_targets,
    "three valves with input targets and the Riccati terminal weight": _three_valves_with_targets_riccati,
    "transfer matrix, bypass valve, input targets, measured flow, Riccati, blocked": _transfer_matrix_bypass_riccati,
}


def _export_body(body, format_="state_space", **extra):
    out = {k: copy.deepcopy(body[k]) for k in DESIGN_FIELDS if k in body}
    return {**out, "format": format_, **extra}


def _run(client, body):
    sim = client.post("/simulate", json=body)
    assert sim.status_code == 200, sim.text
    law = client.post("/design/export", json=_export_body(body))
    assert law.status_code == 200, law.text
    return sim.json(), law.json()


def _input_targets(body, steps):
    """The scenario's input targets held step by step (none without weights.input)."""
    sc = body.get("scenario", {})
    if not body["weights"].get("input"):
        return np.zeros((steps, 0))
    m = len(body["model"]["inputs"])
    out = np.tile(np.asarray(sc.get("input_targets") or np.zeros(m), dtype=float), (steps, 1))
    for change in sorted(sc.get("input_target_changes", []), key=lambda e: e["step"]):
        out[change["step"] :] = change["value"]
    return out


def _signals(sim, body=None):
    w = [np.array(sim["measured"]), np.array(sim["setpoints"]), np.array(sim["measured_disturbances"])]
    if body is not None:
        w.append(_input_targets(body, len(w[0])))
    return np.hstack(w)


def _matrix(law, name):
    return np.array(law[name]["values"], dtype=float)


@pytest.mark.parametrize("case", CASES)
def test_the_exported_law_run_by_scipy_gives_simulate_s_inputs(client, case):
    body = CASES[case]()
    sim, law = _run(client, body)
    w = _signals(sim, body)
    assert [s["name"] for s in law["inputs"]] == [*law["d"]["columns"]]
    assert w.shape[1] == len(law["inputs"])
    system = tuple(_matrix(law, k) for k in "abcd")
    _, v, _ = scipy.signal.dlsim((*system, law["sample_time"]), w)  # scipy's LTI simulation
    u = np.array(sim["inputs"])
    m = u.shape[1]
    scale = np.abs(u).max()
    np.testing.assert_allclose(v[:, :m], u, rtol=0, atol=1e-9 * scale)
    moves = np.diff(np.vstack([np.zeros(m), u]), axis=0)
    np.testing.assert_allclose(v[:, m:], moves, rtol=0, atol=1e-9 * scale)
    assert np.abs(moves).max() > 0.01 * scale  # the run does move the valves


def test_the_answer_is_tagged_and_carries_the_design_s_fingerprint(client):
    body = _transfer_matrix()
    law = client.post("/design/export", json=_export_body(body)).json()
    design = client.post("/design", json={k: body[k] for k in DESIGN_FIELDS if k in body}).json()
    assert law["fingerprint"] == design["fingerprint"]
    assert [s["name"] for s in law["inputs"]] == [
        "vessel_temperature.measured",
        "vessel_level.measured",
        "vessel_temperature.setpoint",
        "vessel_level.setpoint",
        "inlet_flow.measured_disturbance",
    ]
    assert [s["role"] for s in law["outputs"]] == ["input", "input", "move", "move"]
    assert law["states"][-2:] == ["steam_valve.previous", "outlet_valve.previous"]
    assert law["c"]["rows"] == ["steam_valve", "outlet_valve", "steam_valve.move", "outlet_valve.move"]
    assert "Design aid" in law["advisory"]
    # the difference equations name every state and signal by its tag
    assert law["equations"][0].startswith("steam_valve(k) = ")
    assert any(e.startswith("outlet_valve.input_disturbance(k+1) = ") for e in law["equations"])
    assert "inlet_flow.measured_disturbance(k)" in " ".join(law["equations"])


def test_the_split_form_applied_unchanged_is_the_system(client):
    law = client.post("/design/export", json=_export_body(_transfer_matrix())).json()
    a, b, c, d = (_matrix(law, k) for k in "abcd")
    ap, bp, bu = (_matrix(law, k) for k in ("state_update", "signal_update", "applied_update"))
    m = bu.shape[1]
    np.testing.assert_allclose(ap + bu @ c[:m], a, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(bp + bu @ d[:m], b, rtol=1e-12, atol=1e-14)


def test_the_csv_tables_read_back_to_the_matrices(client):
    law = client.post("/design/export", json=_export_body(_transfer_matrix())).json()
    for name, text in law["tables"].items():
        rows = list(csv.reader(io.StringIO(text)))  # RFC 4180
        assert text.endswith("\r\n")
        if name.endswith("_offset"):  # a vector: one row per law input (output), one column
            signals = law["inputs" if name == "input_offset" else "outputs"]
            assert rows[0] == ["", "offset"] and [r[0] for r in rows[1:]] == [s["name"] for s in signals]
            assert [float(r[1]) for r in rows[1:]] == law[name]
            continue
        assert rows[0] == ["", *law[name]["columns"]]
        assert [r[0] for r in rows[1:]] == law[name]["rows"]
        np.testing.assert_array_equal(np.array([[float(x) for x in r[1:]] for r in rows[1:]]), _matrix(law, name))


# --------------------------------------------------------------------------- Structured Text


def _block(client, body, **extra):
    r = client.post("/design/export", json=_export_body(body, "structured_text", **extra))
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain")
    return r.text


def _identifier(tag):
    return re.sub(r"[^A-Za-z0-9]+", "_", tag).strip("_").upper()


def _call_inputs(body, w, k, good=None):
    model = body["model"]
    outputs = [s["name"] for s in model["outputs"]]
    disturbances = [s["name"] for s in model.get("disturbances", [])]
    p = len(outputs)
    args = {}
    for i, tag in enumerate(outputs):
        args[_identifier(tag)] = float(w[k, i])
        args[_identifier(tag) + "_SP"] = float(w[k, p + i])
        args[_identifier(tag) + "_OK"] = True if good is None else bool(good[i])
    for i, tag in enumerate(disturbances):
        args[_identifier(tag)] = float(w[k, 2 * p + i])
    if body["weights"].get("input"):
        for j, sig in enumerate(model["inputs"]):
            args[_identifier(sig["name"]) + "_TARGET"] = float(w[k, 2 * p + len(disturbances) + j])
    return args


@pytest.mark.parametrize("case", CASES)
def test_the_structured_text_interpreted_call_by_call_gives_simulate_s_inputs(client, case):
    body = CASES[case]()
    sim = client.post("/simulate", json=body).json()
    text = _block(client, body)
    block = FunctionBlock(text)  # parses and checks, or raises
    w = _signals(sim, body)
    tags = [s["name"] for s in body["model"]["inputs"]]
    u = np.array(sim["inputs"])
    got = np.array(
        [[out[_identifier(t)] for t in tags] for out in (block.call(**_call_inputs(body, w, k)) for k in range(len(w)))]
    )
    np.testing.assert_allclose(got, u, rtol=0, atol=1e-9 * np.abs(u).max())


def test_the_block_s_header_and_declarations(client):
    body = _transfer_matrix()
    text = _block(client, body, block_name="VesselLaw")
    fingerprint = client.post("/design", json={k: body[k] for k in DESIGN_FIELDS if k in body}).json()["fingerprint"]
    header = text.split("*)", 1)[0]
    assert f"Design fingerprint: {fingerprint}" in header
    assert f"Generated: {datetime.datetime.now(datetime.UTC).date().isoformat()}" in header
    assert "must be reviewed and tested before use" in header
    assert "Sample time: call the block exactly once every 1.0" in header
    assert "Clamping:" in header and "Bad measurements:" in header
    assert text.isascii() and "{" not in text  # no pragmas or attributes of any dialect
    block = FunctionBlock(text)
    assert block.name == "VesselLaw"
    assert block.names("input") == [
        "VESSEL_TEMPERATURE",
        "VESSEL_TEMPERATURE_OK",
        "VESSEL_LEVEL",
        "VESSEL_LEVEL_OK",
        "VESSEL_TEMPERATURE_SP",
        "VESSEL_LEVEL_SP",
        "INLET_FLOW",
        "RESET",
    ]
    assert block.names("output") == [
        "STEAM_VALVE",
        "STEAM_VALVE_MOVE",
        "OUTLET_VALVE",
        "OUTLET_VALVE_MOVE",
        "HELD",
        "CLAMPED",
    ]
    assert not block.names("constant")  # no limits in the request: nothing to clamp to


def test_the_grammar_check_can_fail():
    good = "FUNCTION_BLOCK F\nVAR_INPUT a : LREAL; END_VAR\nVAR_OUTPUT b : LREAL; END_VAR\nb := 2.0 * a;\nEND_FUNCTION_BLOCK\n"
    assert FunctionBlock(good).call(A=1.5) == {"B": 3.0}
    with pytest.raises(UnexpectedInput):
        FunctionBlock(good.replace("b := 2.0 * a;", "IF a > 0.0 THEN b := a;"))  # no END_IF
    with pytest.raises(UnexpectedInput):
        FunctionBlock(good.replace("2.0", "2."))  # a real literal needs digits after the point
    with pytest.raises(CheckError, match="cannot be assigned"):
        FunctionBlock(good.replace("b := 2.0 * a;", "a := 1.0;"))
    with pytest.raises(CheckError, match="not declared"):
        FunctionBlock(good.replace("2.0 * a", "2.0 * c"))
    with pytest.raises(CheckError, match="declared twice"):
        FunctionBlock(good.replace("b : LREAL;", "b : LREAL; A : LREAL;"))


def _law_step(law, s, w, lo, hi, dmax):
    """One call of the split form with the block's documented clamp (move, then level)."""
    m = len(lo)
    cu, du = _matrix(law, "c")[:m], _matrix(law, "d")[:m]
    ap, bp, bu = (_matrix(law, k) for k in ("state_update", "signal_update", "applied_update"))
    previous = s[-m:]
    u = cu @ s + du @ w
    u = np.clip(u, previous - dmax, previous + dmax)
    u = np.clip(u, lo, hi)
    return u, ap @ s + bp @ w + bu @ u


def test_clamping_and_the_hold_on_bad_measurements_in_closed_loop(client):
    body = _vessel()
    body["limits"] = {"input_min": [-3.0, -20.0], "input_max": [3.0, 20.0], "move_max": [0.5, None]}
    text = _block(client, body)
    law = client.post("/design/export", json=_export_body(body)).json()
    assert law["limits"] == {"input_min": [-3.0, -20.0], "input_max": [3.0, 20.0], "move_max": [0.5, None]}
    block = FunctionBlock(text)
    assert block.names("constant") == [
        "STEAM_VALVE_MOVE_MAX",
        "STEAM_VALVE_MIN",
        "OUTLET_VALVE_MIN",
        "STEAM_VALVE_MAX",
        "OUTLET_VALVE_MAX",
    ]
    a, b, c = (np.array(body["model"][k]) for k in "abc")
    lo, hi, dmax = np.array([-3.0, -20.0]), np.array([3.0, 20.0]), np.array([0.5, np.inf])
    pred = _matrix(law, "prediction")
    x, s = np.zeros(4), np.zeros(len(law["states"]))
    r = np.array([2.0, -1.0])
    clamped = held = 0
    for k in range(120):
        y = c @ x
        good = [not (30 <= k < 36), True]  # the temperature reading is bad for six calls
        out = block.call(**_call_inputs(body, np.concatenate([y, r])[None, :], 0, good))
        used = y.copy()
        if not good[0]:
            used[0] = pred[0] @ s  # the documented hold: the estimator's prediction replaces it
        u, s = _law_step(law, s, np.concatenate([used, r]), lo, hi, dmax)
        got = np.array([out["STEAM_VALVE"], out["OUTLET_VALVE"]])
        np.testing.assert_allclose(got, u, rtol=0, atol=1e-10)
        assert out["HELD"] == (not good[0])
        assert np.all(got >= lo - 1e-12) and np.all(got <= hi + 1e-12)
        assert abs(out["STEAM_VALVE_MOVE"]) <= 0.5 + 1e-12
        clamped += out["CLAMPED"]
        held += out["HELD"]
        x = a @ x + b @ got
    assert clamped >= 5 and held == 6  # the limits did act, and so did the hold
    # the loop still settles on the reachable setpoint once the clamp lets go
    np.testing.assert_allclose(c @ x, r, atol=1e-3)


def test_reset_restarts_from_rest(client):
    block = FunctionBlock(_block(client, _vessel()))
    first = block.call(VESSEL_TEMPERATURE=0.2, VESSEL_LEVEL=0.0, VESSEL_TEMPERATURE_SP=1.0, VESSEL_LEVEL_SP=0.0)
    for _ in range(5):
        block.call()
    again = block.call(RESET=True)
    assert again == first


# --------------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    "edit,pointer",
    [
        # a measured feed-through would make the law's input depend on itself (an algebraic loop)
        (
            lambda b: b["model"].update(c_measured=b["model"]["c"], d_measured=[[0.1, 0.0], [0.0, 0.0]]),
            "/model/d_measured/0",
        ),
        (lambda b: b.update(format="ladder"), "/format"),
        (lambda b: b.update(block_name="2nd law"), "/block_name"),
        (lambda b: b.update(block_name="a__b"), "/block_name"),
        (lambda b: b["weights"].update(output=[1.0]), "/weights/output"),
    ],
)
def test_bad_input_is_a_422_naming_the_field(client, edit, pointer):
    body = _export_body(_vessel())
    edit(body)
    r = client.post("/design/export", json=body)
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert pointer in [e["pointer"] for e in r.json()["errors"]]


# --------------------------------------------------------------------------- operating point

OPERATING_POINT = {"inputs": [45.0, 60.0], "outputs": [80.0, 50.0], "disturbances": [12.0]}


def _absolute(body):
    """The same request in absolute units: the operating point added to every absolute value.

    A linear model holds in deviations from its operating point (common practice), so the
    absolute request is the deviation request with each value shifted.
    """
    out = copy.deepcopy(body)
    m, p = len(out["model"]["inputs"]), len(out["model"]["outputs"])
    u0 = (OPERATING_POINT["inputs"] + [30.0])[:m]
    z0 = OPERATING_POINT["outputs"][:p]
    d0 = OPERATING_POINT["disturbances"][: len(out["model"].get("disturbances", []))]
    out["model"]["operating_point"] = {"inputs": u0, "outputs": z0, **({"disturbances": d0} if d0 else {})}
    sc = out["scenario"]
    sc.pop("true_plant", None)  # a true plant in deviations: compared on the model itself here
    for e in sc.get("setpoint_changes", []):
        e["setpoint"] = [v + z for v, z in zip(e["setpoint"], z0, strict=True)]
    for e in sc.get("measured_disturbances", []):
        e["value"] = [v + d for v, d in zip(e["value"], d0, strict=True)]
    if "input_targets" in sc:
        sc["input_targets"] = [v + u for v, u in zip(sc["input_targets"], u0, strict=True)]
    for e in sc.get("input_target_changes", []):
        e["value"] = [v + u for v, u in zip(e["value"], u0, strict=True)]
    lim = out.get("limits")
    if lim:
        for key, shift in (("input_min", u0), ("input_max", u0)):
            if key in lim:
                lim[key] = [None if v is None else v + s for v, s in zip(lim[key], shift, strict=True)]
    return out, np.array(u0), np.array(z0), np.array(d0)


OP_CASES = {
    "vessel": _vessel,
    "vessel with the Riccati terminal weight": _vessel_riccati,
    "transfer matrix with a measured disturbance": _transfer_matrix,
    "transfer matrix with the Riccati terminal weight": _transfer_matrix_riccati,
    "three valves with input targets": _three_valves_with_targets,
    "three valves with input targets and the Riccati terminal weight": _three_valves_with_targets_riccati,
    "transfer matrix, bypass valve, input targets, measured flow, Riccati, blocked": _transfer_matrix_bypass_riccati,
}


@pytest.mark.parametrize("case", OP_CASES)
def test_the_exported_law_with_an_operating_point_runs_in_absolute_units(client, case):
    body, u0, z0, d0 = _absolute(OP_CASES[case]())
    deviation = copy.deepcopy(body)
    deviation["model"].pop("operating_point")
    deviation["scenario"] = OP_CASES[case]()["scenario"]
    deviation["scenario"].pop("true_plant", None)
    sim, law = _run(client, body)
    dev = client.post("/simulate", json=deviation).json()
    # /simulate's absolute run is its deviation run shifted by the operating point
    np.testing.assert_allclose(np.array(sim["inputs"]), np.array(dev["inputs"]) + u0, rtol=0, atol=1e-9)
    w = _signals(sim, body)  # absolute measurements, setpoints, disturbances, input targets
    w0 = np.array(law["input_offset"])
    targets = u0 if body["weights"].get("input") else np.zeros(0)
    np.testing.assert_array_equal(w0, np.concatenate([z0, z0, d0, targets]))
    m = len(u0)
    np.testing.assert_array_equal(law["output_offset"], [*u0, *np.zeros(m)])
    # the documented affine law: s(k+1) = A s + B (w - w0), v = C s + D (w - w0) + v0 (scipy.signal.dlsim)
    system = tuple(_matrix(law, k) for k in "abcd")
    _, v, _ = scipy.signal.dlsim((*system, law["sample_time"]), w - w0)
    v = v + np.array(law["output_offset"])
    u = np.array(sim["inputs"])
    scale = np.abs(u).max()
    np.testing.assert_allclose(v[:, :m], u, rtol=0, atol=1e-9 * scale)
    assert u.min() > 20.0  # absolute valve positions, not deviations
    # the first difference equation ends in the constant u0 - Du w0 (10 significant digits)
    equation = law["equations"][0]
    found = re.search(r" ([+-]) ([0-9.eE+-]+)$", equation)
    assert found, equation
    constant = float(found.group(2)) * (-1.0 if found.group(1) == "-" else 1.0)
    expected = u0[0] - system[3][0] @ w0
    assert abs(constant - expected) <= 1e-9 * abs(expected), (constant, expected)
    # ... and the offsets' CSV tables read back
    rows = list(csv.reader(io.StringIO(law["tables"]["input_offset"])))
    assert rows[0] == ["", "offset"] and [float(r[1]) for r in rows[1:]] == list(w0)


@pytest.mark.parametrize("case", OP_CASES)
def test_the_structured_text_with_an_operating_point_reproduces_the_absolute_run(client, case):
    body, u0, _, _ = _absolute(OP_CASES[case]())
    sim = client.post("/simulate", json=body)
    assert sim.status_code == 200, sim.text
    sim = sim.json()
    text = _block(client, body)
    block = FunctionBlock(text)  # the test interpreter of IEC 61131-3 (tests/api/iec_st.py)
    assert "Operating point: the signals are absolute" in text
    tags = [s["name"] for s in body["model"]["inputs"]]
    wanted = {_identifier(t) + "_OP" for t in tags}
    assert [_identifier(t) + "_OP" for t in tags] == [n for n in block.names("constant") if n in wanted]
    w = _signals(sim, body)
    u = np.array(sim["inputs"])
    got = np.array(
        [[out[_identifier(t)] for t in tags] for out in (block.call(**_call_inputs(body, w, k)) for k in range(len(w)))]
    )
    np.testing.assert_allclose(got, u, rtol=0, atol=1e-9 * np.abs(u).max())


def test_the_structured_text_clamps_to_absolute_limits_with_an_operating_point(client):
    body, u0, z0, _ = _absolute(_vessel())
    body["limits"] = {"input_min": [42.0, 40.0], "input_max": [48.0, 80.0], "move_max": [0.5, None]}
    text = _block(client, body)
    law = client.post("/design/export", json=_export_body(body)).json()
    assert law["limits"] == {"input_min": [42.0, 40.0], "input_max": [48.0, 80.0], "move_max": [0.5, None]}
    block = FunctionBlock(text)
    a, b, c = (np.array(body["model"][k]) for k in "abc")
    lo, hi, dmax = np.array([42.0, 40.0]), np.array([48.0, 80.0]), np.array([0.5, np.inf])
    w0, v0 = np.array(law["input_offset"]), np.array(law["output_offset"])[:2]
    x, s = np.zeros(4), np.zeros(len(law["states"]))  # the plant in deviations, at rest at the point
    r = z0 + np.array([2.0, -1.0])
    clamped = 0
    for _ in range(150):
        y = z0 + c @ x
        out = block.call(**_call_inputs(body, np.concatenate([y, r])[None, :], 0))
        # the documented affine split form: u = Cu s + Du (w - w0) + u0, clamped in absolute units,
        # s(k+1) = Ap s + Bp (w - w0) + Bu (u - u0)
        m = 2
        cu, du = _matrix(law, "c")[:m], _matrix(law, "d")[:m]
        ap, bp, bu = (_matrix(law, k) for k in ("state_update", "signal_update", "applied_update"))
        wd = np.concatenate([y, r]) - w0
        previous = s[-m:] + v0
        u = np.clip(np.clip(cu @ s + du @ wd + v0, previous - dmax, previous + dmax), lo, hi)
        s = ap @ s + bp @ wd + bu @ (u - v0)
        got = np.array([out["STEAM_VALVE"], out["OUTLET_VALVE"]])
        np.testing.assert_allclose(got, u, rtol=0, atol=1e-9)
        assert np.all(got >= lo - 1e-12) and np.all(got <= hi + 1e-12)
        clamped += out["CLAMPED"]
        x = a @ x + b @ (got - u0)
    assert clamped >= 5  # the absolute limits did act
    np.testing.assert_allclose(z0 + c @ x, r, atol=1e-3)


def test_an_export_limit_that_excludes_the_operating_point_is_a_422_saying_so(client):
    body, _, _, _ = _absolute(_vessel())
    body["limits"] = {"input_min": [50.0, 10.0]}  # the steam valve's operating point is 45 %
    r = client.post("/design/export", json=_export_body(body))
    assert r.status_code == 422, r.text
    error = r.json()["errors"][0]
    assert error["pointer"] == "/limits/input_min/0" and "operating point" in error["detail"]
