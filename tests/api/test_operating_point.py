"""Absolute engineering units with model.operating_point: the deviation run shifted, bit for bit.

Source: a linear model holds in deviations from its operating point (common practice); the
absolute run must then be the deviation run plus the operating point, which IEEE arithmetic
makes exact when the deviation request holds the same differences (checked bit for bit).
Plant: the bundled vessel (invented numbers) at an invented operating point.
"""

from __future__ import annotations

import copy

from service.pipeline.examples import load_example

U0 = [45.0, 60.0]  # steam valve %, outlet valve %
Z0 = [80.0, 50.0]  # vessel temperature degC, vessel level %


def _absolute_request():
    request = load_example("simulate_request.json")
    request["model"]["operating_point"] = {"inputs": U0, "outputs": Z0}
    request["scenario"]["setpoint_changes"] = [{"step": 10, "setpoint": [81.0, 49.5]}]
    request["scenario"]["initial"] = {"input": [45.0, 60.0], "setpoint": [80.0, 50.0]}
    request["scenario"]["true_plant"]["operating_point"] = None
    del request["scenario"]["true_plant"]["operating_point"]
    request["limits"] = {"input_min": [10.0, 10.0], "input_max": [90.0, 90.0], "output_max": [85.0, 70.0]}
    return request


def _deviation_request(absolute):
    request = copy.deepcopy(absolute)
    del request["model"]["operating_point"]
    sc = request["scenario"]
    sc["setpoint_changes"] = [
        {"step": e["step"], "setpoint": [v - z for v, z in zip(e["setpoint"], Z0, strict=True)]}
        for e in sc["setpoint_changes"]
    ]
    sc["initial"] = {
        "input": [v - u for v, u in zip(sc["initial"]["input"], U0, strict=True)],
        "setpoint": [v - z for v, z in zip(sc["initial"]["setpoint"], Z0, strict=True)],
    }
    lim = request["limits"]
    lim["input_min"] = [v - u for v, u in zip(lim["input_min"], U0, strict=True)]
    lim["input_max"] = [v - u for v, u in zip(lim["input_max"], U0, strict=True)]
    lim["output_max"] = [v - z for v, z in zip(lim["output_max"], Z0, strict=True)]
    return request


def test_an_absolute_run_is_the_deviation_run_shifted_bit_for_bit(client):
    absolute = client.post("/simulate", json=_absolute_request())
    deviation = client.post("/simulate", json=_deviation_request(_absolute_request()))
    assert absolute.status_code == deviation.status_code == 200, absolute.text
    a, d = absolute.json(), deviation.json()
    for key, point in (("outputs", Z0), ("measured", Z0), ("setpoints", Z0), ("inputs", U0)):
        shifted = [[v + p for v, p in zip(row, point, strict=True)] for row in d[key]]
        assert a[key] == shifted, key  # exact equality of doubles
    assert a["estimates"] == d["estimates"] and a["design"]["gain"] == d["design"]["gain"]
    assert a["performance"] == d["performance"]  # offsets and moves are differences
    assert a["outputs"][-1][0] > 75.0  # absolute degC, not deviations
    assert a["limit_summary"]["signals"]
    for sa, sd in zip(a["limit_summary"]["signals"], d["limit_summary"]["signals"], strict=True):
        offset = {"input": U0, "output": Z0}.get(sa["kind"])
        index = {"steam_valve": 0, "outlet_valve": 1, "vessel_temperature": 0, "vessel_level": 1}[sa["signal"]]
        assert sa["limit"] == (sd["limit"] if offset is None else sd["limit"] + offset[index])


def test_a_limit_that_excludes_the_operating_point_is_a_422_saying_so(client):
    request = _absolute_request()
    request["limits"]["input_min"] = [50.0, 10.0]  # the steam valve's operating point is 45 %
    response = client.post("/simulate", json=request)
    assert response.status_code == 422
    (error,) = response.json()["errors"]
    assert error["pointer"] == "/limits/input_min/0"
    assert "excludes the operating point" in error["detail"] and "steam_valve" in error["detail"]
    design = {k: request[k] for k in ("model", "horizons", "weights", "limits")}
    response = client.post("/design", json=design)
    assert response.status_code == 422 and response.json()["errors"][0]["pointer"] == "/limits/input_min/0"


def test_a_wrong_sized_operating_point_is_a_422(client):
    request = _absolute_request()
    request["model"]["operating_point"]["inputs"] = [45.0]
    response = client.post("/simulate", json=request)
    assert response.status_code == 422
    assert response.json()["errors"][0]["pointer"] == "/model/operating_point/inputs"


def test_the_design_limit_check_reports_absolute_values(client):
    request = _absolute_request()
    design = {k: request[k] for k in ("model", "horizons", "weights", "limits")}
    design["limits"]["nominal_step"] = [30.0, 0.0]
    body = client.post("/design", json=design).json()
    deviation = _deviation_request(request)
    plain = {k: deviation[k] for k in ("model", "horizons", "weights", "limits")}
    plain["limits"]["nominal_step"] = [30.0, 0.0]
    other = client.post("/design", json=plain).json()
    assert body["gain"] == other["gain"] and body["fingerprint"] != other["fingerprint"]
    assert body["limit_check"]["violations"]  # the nominal step of 30 degC breaks output_max 85
    for va, vd in zip(body["limit_check"]["violations"], other["limit_check"]["violations"], strict=True):
        shift = {"input": U0, "output": Z0}.get(va["kind"])
        index = {"steam_valve": 0, "outlet_valve": 1, "vessel_temperature": 0, "vessel_level": 1}[va["signal"]]
        assert va["value"] == (vd["value"] if shift is None else vd["value"] + shift[index])
