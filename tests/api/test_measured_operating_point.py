"""model.operating_point with measured outputs of their own: the sensors' operating values, operating_point.measured.

The plant is the heater and vessel of tests/api/test_measured_outputs.py (invented), at an
invented operating point: 20 kW on the heater, the inlet at 60 degC, the outlet sensor reading
55 degC there (heat lost on the way: a value the deviation model cannot give).

References:

- a linear model holds in deviations from its operating point (common practice): the
  absolute run is the deviation run with the operating point added to every absolute series,
  which IEEE arithmetic makes exact when the deviation request holds the same differences
  (checked bit for bit, like tests/api/test_operating_point.py);
- ``scipy.signal.dlsim`` runs the exported law in its documented affine form
  ``s(k+1) = A s + B (w - w0)``, ``v = C s + D (w - w0) + v0``;
- ``tests/api/iec_st.py`` (a lark grammar and interpreter of IEC 61131-3 Structured Text)
  runs the exported block on the absolute signals.
"""

from __future__ import annotations

import copy
import csv
import io

import numpy as np
import pytest
import scipy.signal

from tests.api.conftest import invalid_fields
from tests.api.iec_st import FunctionBlock
from tests.api.test_measured_outputs import _body

U0, Z0, Y0 = [20.0], [60.0], [55.0]


def _absolute():
    body = _body()
    body["model"]["operating_point"] = {"inputs": U0, "outputs": Z0, "measured": Y0}
    for e in body["scenario"]["setpoint_changes"]:
        e["setpoint"] = [v + z for v, z in zip(e["setpoint"], Z0, strict=True)]
    return body


def _post(client, path, body, **headers):
    r = client.post(path, json=body, headers=headers)
    assert r.status_code == 200, r.text
    return r


def _export(client, body, format_):
    fields = {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator")}
    return _post(client, "/design/export", {**fields, "format": format_})


def _shifted(series, point):
    return [[v + p for v, p in zip(row, point, strict=True)] for row in series]


def test_the_absolute_run_is_the_deviation_run_shifted_by_the_operating_point(client):
    absolute = _post(client, "/simulate", _absolute()).json()
    deviation = _post(client, "/simulate", _body()).json()
    for key, point in (("outputs", Z0), ("setpoints", Z0), ("inputs", U0), ("measured", Y0)):
        assert absolute[key] == _shifted(deviation[key], point), key  # exact equality of doubles
    assert absolute["estimates"] == deviation["estimates"]  # the solver works in deviations
    assert absolute["performance"] == deviation["performance"]
    assert absolute["outputs"][0] == Z0  # at rest at the operating point
    assert abs(absolute["measured"][0][0] - Y0[0]) < 0.1  # the sensor there, up to its noise (std 0.01)
    # the CSV answer's sensor column is the absolute one too
    rows = list(csv.reader(io.StringIO(_post(client, "/simulate", _absolute(), accept="text/csv").text)))
    assert rows[0][-1] == "outlet_temp"
    assert [float(r[-1]) for r in rows[1:]] == [row[0] for row in absolute["measured"]]


def test_the_exported_law_in_absolute_units_reproduces_simulate_s_absolute_run(client):
    body = _absolute()
    sim = _post(client, "/simulate", body).json()
    law = _export(client, body, "state_space").json()
    assert [(s["name"], s["role"]) for s in law["inputs"]] == [
        ("outlet_temp.measured", "measured"),
        ("inlet_temp.setpoint", "setpoint"),
    ]
    w0 = np.array(law["input_offset"])
    np.testing.assert_array_equal(w0, [*Y0, *Z0])  # the sensor's operating value, then the setpoint's
    v0 = np.array(law["output_offset"])
    w = np.hstack([np.array(sim["measured"]), np.array(sim["setpoints"])])  # absolute, noise included
    system = tuple(np.array(law[k]["values"], dtype=float) for k in "abcd")
    _, v, _ = scipy.signal.dlsim((*system, law["sample_time"]), w - w0)  # scipy's LTI simulation
    v = v + v0
    u = np.array(sim["inputs"])
    np.testing.assert_allclose(v[:, :1], u, rtol=0, atol=1e-9 * np.abs(u).max())
    assert u.min() > 15.0  # absolute heater power, not deviations


def test_the_structured_text_reads_the_absolute_sensor(client):
    body = _absolute()
    sim = _post(client, "/simulate", body).json()
    block = FunctionBlock(_export(client, body, "structured_text").text)
    assert block.names("input") == ["OUTLET_TEMP", "OUTLET_TEMP_OK", "INLET_TEMP_SP", "RESET"]
    constants = block.names("constant")
    assert {"OUTLET_TEMP_OP", "INLET_TEMP_OP", "HEATER_OP"} <= set(constants)
    u = np.array(sim["inputs"])[:, 0]
    got = [
        block.call(OUTLET_TEMP=float(y[0]), INLET_TEMP_SP=float(r[0]))["HEATER"]
        for y, r in zip(sim["measured"], sim["setpoints"], strict=True)
    ]
    np.testing.assert_allclose(got, u, rtol=0, atol=1e-9 * np.abs(u).max())


def _export_body(body):
    fields = {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator")}
    return {**fields, "format": "state_space"}


@pytest.mark.parametrize("path", ["/simulate", "/design/export"])
def test_without_the_sensors_operating_values_the_answer_names_the_field(client, path):
    body = _absolute()
    del body["model"]["operating_point"]["measured"]
    found = invalid_fields(client, path, body if path == "/simulate" else _export_body(body))
    detail = found["/model/operating_point/measured"]
    assert "operating_point.measured" in detail and "cannot be derived" in detail


@pytest.mark.parametrize("path", ["/simulate", "/design/export"])
def test_a_wrong_count_of_sensor_values_is_refused_naming_the_field(client, path):
    body = _absolute()
    body["model"]["operating_point"]["measured"] = [55.0, 54.0]
    found = invalid_fields(client, path, body if path == "/simulate" else _export_body(body))
    assert "one value per measured output (1" in found["/model/operating_point/measured"]


def test_sensor_values_for_a_model_that_measures_its_controlled_outputs_are_refused(client):
    body = _absolute()
    for model in (body["model"], body["scenario"]["true_plant"]):
        model.pop("c_measured")
        model.pop("measured")
    found = invalid_fields(client, "/simulate", body)
    assert "operating_point.outputs" in found["/model/operating_point/measured"]
    del body["model"]["operating_point"]["measured"]
    del body["scenario"]["measurement_noise"]
    run = _post(client, "/simulate", body).json()  # without them: the measured series are around z0
    assert run["measured"] == run["outputs"] and run["measured"][0] == Z0
