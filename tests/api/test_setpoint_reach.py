"""Setpoints out of reach at steady state: /design says so, and /simulate when its run shows it.

Our own invented layouts, around an operating point in absolute units: a drum heated by one
steam valve whose temperature and pressure are both controlled (fewer valves than outputs), two
valves that act on two outputs through one combination only (a steady-state gain of rank 1),
and a square unit and an integrating level whose setpoints are all reachable.

References beside each check: the rank of the steady-state gain ``G = C (I - A)^-1 B`` by
``numpy.linalg.matrix_rank`` (a set of setpoints ``r`` can be held exactly when ``r - z0`` lies
in the range of ``G``; common practice), and the weighted best fit ``min |W (G u - r)|`` by
``numpy.linalg.lstsq`` for where an offset-free loop settles when it does not.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

A = [[0.9, 0.0], [0.0, 0.8]]
C = [[1.0, 0.0], [0.0, 1.0]]
Z0 = [172.0, 640.0]  # drum temperature degC, drum pressure kPa
OUTPUTS = [{"name": "drum_temperature", "unit": "degC"}, {"name": "drum_pressure", "unit": "kPa"}]


def _request(b, u0, inputs, weights_output=(1.0, 1.0), **extra):
    body = {
        "model": {
            "kind": "state_space",
            "a": A,
            "b": b,
            "c": C,
            "sample_time": 1.0,
            "inputs": inputs,
            "outputs": copy.deepcopy(OUTPUTS),
            "operating_point": {"inputs": u0, "outputs": Z0},
        },
        "horizons": {"prediction": 30, "control": 4},
        "weights": {"output": list(weights_output), "move": [0.1] * len(u0)},
        "estimator": {"kind": "output_disturbance"},
    }
    body.update(extra)
    return body


ONE_VALVE = {"b": [[0.3], [0.8]], "u0": [45.0], "inputs": [{"name": "steam_valve", "unit": "%"}]}
# two valves whose steady effects are proportional: G has rank 1 (invented)
TIED = {
    "b": [[0.1, 0.2], [0.2, 0.4]],
    "u0": [45.0, 30.0],
    "inputs": [{"name": "steam_valve", "unit": "%"}, {"name": "bypass_valve", "unit": "%"}],
}
SQUARE = {
    "b": [[0.1, -0.05], [0.2, 0.3]],
    "u0": [45.0, 30.0],
    "inputs": [{"name": "steam_valve", "unit": "%"}, {"name": "vent_valve", "unit": "%"}],
}


def _gain(layout):
    return np.array(C) @ np.linalg.solve(np.eye(2) - np.array(A), np.array(layout["b"]))


def _codes(answer):
    return [w["code"] for w in answer["warnings"]]


@pytest.mark.parametrize(
    "layout,cause", [(ONE_VALVE, "1 manipulated variable for 2"), (TIED, "steady-state gain of lower rank")]
)
def test_design_says_when_not_every_set_of_setpoints_can_be_held(client, layout, cause):
    assert np.linalg.matrix_rank(_gain(layout)) == 1 < 2  # the reference: G of rank 1 for 2 outputs
    answer = client.post("/design", json=_request(**layout)).json()
    found = [w for w in answer["warnings"] if w["code"] == "setpoints_out_of_reach"]
    assert len(found) == 1
    assert cause in found[0]["message"] and "drum_temperature, drum_pressure" in found[0]["message"]


def test_a_square_unit_and_an_output_of_weight_zero_are_not_warned(client):
    assert np.linalg.matrix_rank(_gain(SQUARE)) == 2
    assert "setpoints_out_of_reach" not in _codes(client.post("/design", json=_request(**SQUARE)).json())
    # one valve, the pressure only watched (weight 0): the one weighted setpoint is reachable
    watched = _request(**ONE_VALVE, weights_output=(1.0, 0.0))
    assert "setpoints_out_of_reach" not in _codes(client.post("/design", json=watched).json())


def test_an_integrating_level_with_a_valve_each_is_reachable(client):
    # a level integrates the difference of feed and draw (pole at 1): at steady state the draw
    # balances the feed, and the level rests wherever it was taken (common practice), so a
    # temperature and a level with a valve each are both reachable.
    body = _request(**SQUARE)
    body["model"]["a"] = [[0.9, 0.0], [0.0, 1.0]]
    body["model"]["b"] = [[0.1, 0.05], [0.2, -0.3]]
    body["model"]["outputs"][1] = {"name": "drum_level", "unit": "%"}
    assert "setpoints_out_of_reach" not in _codes(client.post("/design", json=body).json())


@pytest.mark.parametrize("factor", [1e-9, 1e9])
def test_a_state_in_other_units_changes_no_verdict(client, factor):
    # x' = D x: A' = D A D^-1, B' = D B, C' = C D^-1 (change of state coordinates; textbook)
    for layout, warned in ((SQUARE, False), (ONE_VALVE, True)):
        body = _request(**layout)
        d = np.array([1.0, factor])
        model = body["model"]
        model["a"] = (np.array(A) * d[:, None] / d[None, :]).tolist()
        model["b"] = (np.array(layout["b"]) * d[:, None]).tolist()
        model["c"] = (np.array(C) / d[None, :]).tolist()
        assert ("setpoints_out_of_reach" in _codes(client.post("/design", json=body).json())) is warned


def test_simulate_warns_when_its_run_misses_a_setpoint_and_settles_on_the_weighted_best_fit(client):
    gain = _gain(ONE_VALVE)
    weights = np.array([1.0, 4.0])
    # a setpoint on the reachable line: the valve 5 % up holds both outputs there, no warning
    on_line = (np.array(Z0) + gain @ [5.0]).tolist()
    body = _request(**ONE_VALVE, weights_output=weights.tolist())
    body["scenario"] = {"steps": 200, "setpoint_changes": [{"step": 3, "setpoint": on_line}]}
    answer = client.post("/simulate", json=body).json()
    assert "setpoints_out_of_reach" not in _codes(answer)
    np.testing.assert_allclose(answer["outputs"][-1], on_line, atol=1e-6)
    # off the line: the warning, with the step, and the run settles on the weighted best fit
    off_line = [Z0[0] + 2.0, Z0[1] + 1.0]
    body["scenario"]["setpoint_changes"] = [{"step": 3, "setpoint": off_line}]
    answer = client.post("/simulate", json=body).json()
    found = [w for w in answer["warnings"] if w["code"] == "setpoints_out_of_reach"]
    assert len(found) == 1 and found[0]["message"].startswith("From step 3 of this run")
    w = np.diag(np.sqrt(weights))
    u = np.linalg.lstsq(w @ gain, w @ (np.array(off_line) - Z0), rcond=None)[0]
    np.testing.assert_allclose(answer["outputs"][-1], np.array(Z0) + gain @ u, atol=1e-6)
