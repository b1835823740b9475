"""Zones through the API: a sump level held between 30 and 70 % while a composition tracks its setpoint.

Plant (invented numbers, our own scenario): the bottoms of a column, one sample a minute.
The bottoms composition (%) is self-regulating (pole 0.9); the sump level (%) integrates the
difference of inflow and draw-off.  Inputs: steam (t/h) and bottoms draw (t/h), around an
operating point of 20 and 15 t/h; composition 2 %, level 50 %.  Everything the requests give
and the answers show is absolute (model.operating_point).  The zone's meaning (weight only
outside the range, floating inside) is that of service.solver.limits.zones; the QP itself is
checked against scipy in tests/solver/test_zones.py.
"""

from __future__ import annotations

import copy
import csv
import io

import pytest

ZONE = {"low": 30.0, "high": 70.0, "weight": 1.0}

SUMP = {
    "model": {
        "kind": "state_space",
        "time_domain": "discrete",
        "sample_time": 1.0,
        "a": [[0.9, 0.0], [0.0, 1.0]],
        "b": [[0.08, 0.02], [0.5, -0.6]],
        "c": [[1.0, 0.0], [0.0, 1.0]],
        "inputs": [
            {"name": "steam", "unit": "t/h", "span": 10.0},
            {"name": "bottoms_draw", "unit": "t/h", "span": 10.0},
        ],
        "outputs": [
            {"name": "bottoms_composition", "unit": "%", "span": 1.0},
            {"name": "sump_level", "unit": "%", "span": 100.0},
        ],
        "operating_point": {"inputs": [20.0, 15.0], "outputs": [2.0, 50.0]},
    },
    "horizons": {"prediction": 30, "control": 5},
    "weights": {"output": [1.0, 0.0], "move": [0.1, 0.1]},
    "zones": [None, ZONE],
}

SCENARIO = {
    "steps": 240,
    "setpoint_changes": [{"step": 10, "setpoint": [2.3, 50.0]}],
    # The draw-off falls by 1 t/h at step 60 (an unmeasured upset): the level rises.
    "input_disturbances": [{"step": 60, "value": [0.0, -1.0]}],
}


def sump_run(**changes):
    request = copy.deepcopy(SUMP)
    request.update(changes)
    request["scenario"] = copy.deepcopy(SCENARIO)
    return request


def test_the_level_floats_inside_its_zone_and_stays_in_it_after_an_upset(client):
    response = client.post("/simulate", json=sump_run())
    assert response.status_code == 200, response.text
    body = response.json()
    level = [row[1] for row in body["outputs"]]
    composition = [row[0] for row in body["outputs"]]
    (zone,) = body["zones"]
    assert zone["output"] == "sump_level" and (zone["low"], zone["high"]) == (30.0, 70.0)  # absolute
    assert zone["ended_inside"] and zone["fraction_inside"] == 1.0 and zone["first_outside"] is None
    assert all(30.0 - 1e-6 <= v <= 70.0 + 1e-6 for v in level)
    # Floats: after the composition step the level drifts (nothing pulls it back to 50 %) ...
    assert level[59] - level[9] > 5.0
    # ... until the predicted level would leave the zone: the upset pushes it up to the edge,
    # where the QP stops it (it never comes back to the middle).
    assert 69.0 < level[-1] <= 70.0 + 1e-6
    # The composition is still offset-free on its setpoint (common practice: an integrating
    # disturbance model per output; the estimator's default chooses it).
    assert abs(composition[-1] - 2.3) < 1e-6
    codes = {w["code"] for w in body["warnings"]} | {w["code"] for w in body["design"]["warnings"]}
    assert "zone_outputs_not_in_gains" in codes and "zone_output" in codes
    for wrong in ("whole_loop_unstable", "unstable_closed_loop", "unweighted_output", "free_input_direction"):
        assert wrong not in codes
    assert {m["cause"] for m in body["whole_loop"]["marginal_modes"]} == {"zone_output"}
    assert body["diverged_at"] is None


def test_a_zone_output_gets_no_setpoint_figures_and_a_setpoint_output_keeps_them(client):
    # The level's setpoint (50 %) is not what the loop holds it to: rise time, offset and the
    # integral error against it would rate the zone output by a target it does not have.
    body = client.post("/simulate", json=sump_run()).json()
    composition, level = body["performance"]["outputs"]
    assert level["name"] == "sump_level" and level["zone"] is True
    for figure in (
        "step",
        "rise_time",
        "settling_time",
        "overshoot_percent",
        "integral_absolute_error",
        "final_offset",
    ):
        assert level[figure] is None, figure
    assert composition["zone"] is False and composition["step"] == 10
    assert abs(composition["final_offset"]) < 1e-6 and composition["rise_time"] is not None


def test_without_the_zone_the_unweighted_level_runs_out_of_the_range(client):
    # The same tuning without the zone is the fixed law alone, which does not act on the
    # level (weight 0): the upset carries the level past 70 % (the zone is what holds it).
    response = client.post("/simulate", json=sump_run(zones=None))
    assert response.status_code == 200, response.text
    level = [row[1] for row in response.json()["outputs"]]
    assert max(level) > 90.0


def test_the_csv_carries_the_zone_edges(client):
    response = client.post("/simulate", json=sump_run(), headers={"Accept": "text/csv"})
    assert response.status_code == 200, response.text
    rows = list(csv.reader(io.StringIO(response.text)))
    header = rows[0]
    low, high = header.index("sump_level.zone_low"), header.index("sump_level.zone_high")
    assert {(r[low], r[high]) for r in rows[1:]} == {("30.0", "70.0")}


def test_design_reports_zone_outputs_as_zones_with_what_the_gains_do(client):
    request = copy.deepcopy(SUMP)
    response = client.post("/design", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    assert body["zones"] == [{"output": "sump_level", "low": 30.0, "high": 70.0, "weight": 1.0, "weight_in_gains": 0.0}]
    loop = body["closed_loop"]
    assert loop["marginal_modes"] and {m["cause"] for m in loop["marginal_modes"]} == {"zone_output"}
    assert max(abs(complex(p["real"], p["imag"])) for p in loop["poles"]) < 1.0 + 1e-6  # never unstable
    codes = [w["code"] for w in body["warnings"]]
    assert "zone_outputs_not_in_gains" in codes
    for wrong in ("unstable_closed_loop", "unweighted_output", "free_input_direction", "marginal_pole"):
        assert wrong not in codes
    message = next(w["message"] for w in body["warnings"] if w["code"] == "zone_outputs_not_in_gains")
    assert "sump_level" in message and "do not act" in message


@pytest.mark.parametrize(
    ("zones", "weights", "where", "words"),
    [
        ([None, {"low": 70.0, "high": 30.0}], [1.0, 0.0], "/zones/1/high", "below its low"),
        ([None, ZONE], [1.0, 2.0], "/weights/output/1", "must be 0"),
        ([None, ZONE], [[1.0, 0.0], [0.0, 0.5]], "/weights/output/1", "row and column"),
        ([ZONE], [1.0, 0.0], "/zones", "expected 2"),
        ([None, {"weight": 2.0}], [1.0, 0.0], "/zones/1", "neither low nor high"),
    ],
)
def test_bad_zones_are_422_naming_the_field(client, zones, weights, where, words):
    request = copy.deepcopy(SUMP)
    request["zones"] = zones
    request["weights"]["output"] = weights
    response = client.post("/design", json=request)
    assert response.status_code == 422, response.text
    errors = response.json()["errors"]
    assert any(e["pointer"] == where and words in e["detail"] for e in errors), errors


def test_a_zone_upside_down_is_named_in_the_values_typed_not_in_deviations(client):
    # Found in an audit of the workbench: around an operating point the message quoted the edges
    # as deviations from it (the level's 70/30 % zone read "(-20) is below its low (20)"), numbers
    # the client never typed.  The gap between the edges is the same in both (70 - 30 = 40).
    request = copy.deepcopy(SUMP)
    request["zones"] = [None, {"low": 70.0, "high": 30.0}]
    response = client.post("/design", json=request)
    assert response.status_code == 422
    (error,) = response.json()["errors"]
    assert error["pointer"] == "/zones/1/high"
    assert "40 below its low" in error["detail"] and "20" not in error["detail"]


def test_zones_with_a_riccati_terminal_weight_are_refused_naming_it(client):
    request = copy.deepcopy(SUMP)
    request["weights"]["terminal"] = "riccati"
    response = client.post("/design", json=request)
    assert response.status_code == 422
    (error,) = response.json()["errors"]
    assert error["pointer"] == "/weights/terminal" and "zones" in error["detail"]


def test_a_zone_weight_must_be_positive(client):
    request = copy.deepcopy(SUMP)
    request["zones"] = [None, {"low": 30.0, "high": 70.0, "weight": 0.0}]
    response = client.post("/design", json=request)
    assert response.status_code == 422
    assert response.json()["errors"][0]["pointer"] == "/zones/1/weight"


def test_every_output_in_a_zone_is_accepted(client):
    # With every output in a zone Q is zero: the gains are zero and the QP does everything.
    request = sump_run(zones=[{"low": 1.5, "high": 2.5}, ZONE])
    request["weights"]["output"] = [0.0, 0.0]
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    assert all(z["ended_inside"] for z in body["zones"])
    assert all(v == 0.0 for row in body["design"]["gain"]["state"] for v in row)
