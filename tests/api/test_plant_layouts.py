"""Practitioners' layouts through the HTTP layer: spare inputs, unweighted levels, integrating levels.

Invented plants in our own scenario (a column with two compositions and three inputs; a vessel
with a level).  Sources beside each check: the eigenvector facts of the incremental loop (see
tests/solver/test_marginal.py) and a bounded run (common practice).
"""

from __future__ import annotations

import copy

import numpy as np

# Two compositions, three inputs (reflux, boil-up, feed preheat): one spare direction.
COLUMN = {
    "model": {
        "kind": "state_space",
        "a": [[0.9, 0.0], [0.0, 0.8]],
        "b": [[1.0, 0.5, 0.2], [0.0, 1.0, 0.3]],
        "c": [[1.0, 0.0], [0.0, 1.0]],
        "inputs": [{"name": "reflux"}, {"name": "boilup"}, {"name": "feed_preheat"}],
        "outputs": [{"name": "top_purity"}, {"name": "bottom_purity"}],
        "sample_time": 1.0,
    },
    "horizons": {"prediction": 20, "control": 3},
    "weights": {"output": [1.0, 1.0], "move": [0.1, 0.1, 0.1]},
}


def test_a_spare_input_is_a_named_marginal_mode_not_an_unstable_loop(client):
    body = client.post("/design", json=COLUMN).json()
    loop = body["closed_loop"]
    assert loop["stable"] is False
    (mode,) = loop["marginal_modes"]
    assert mode["cause"] == "free_input_direction"
    assert mode["signals"] == ["reflux", "boilup", "feed_preheat"]
    assert abs(complex(mode["pole"]["real"], mode["pole"]["imag"]) - 1.0) < 1e-6
    codes = [w["code"] for w in body["warnings"]]
    assert "unstable_closed_loop" not in codes and codes.count("free_input_direction") == 1
    advice = next(w for w in body["warnings"] if w["code"] == "free_input_direction")["message"]
    assert "weights.input" in advice and "raise the move weights" not in advice


def test_a_spare_input_run_stays_bounded_and_is_not_called_unstable(client):
    request = copy.deepcopy(COLUMN)
    request["scenario"] = {"steps": 200, "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}]}
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    codes = [w["code"] for w in body["warnings"]]
    assert "whole_loop_unstable" not in codes and body["diverged_at"] is None
    assert [m["cause"] for m in body["whole_loop"]["marginal_modes"]] == ["free_input_direction"]
    outputs = np.array(body["outputs"])
    assert np.all(np.abs(outputs) < 10.0)
    assert np.allclose(outputs[-1], [1.0, -0.5], atol=1e-6)  # the setpoints are still met
