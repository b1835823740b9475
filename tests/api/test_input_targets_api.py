"""Input targets through the HTTP layer: weights.input, scenario.input_targets, gain.input_target.

Invented plant in our own scenario: a column with two compositions and three inputs (reflux,
boil-up, feed preheat), in absolute engineering units around an invented operating point, run
on a true plant with 20 % more gain.  References beside each check: the true plant's own
steady-state target by ``scipy.linalg.lstsq`` on the null space of its steady-state and output
equations; the offset-free conditions (Muske and Badgwell 2002; Pannocchia and Rawlings 2003);
``numpy.linalg.eigvals`` of the closed-loop matrix of the design notes.
"""

from __future__ import annotations

import copy

import numpy as np
import scipy.linalg

from service.solver.design.marginal import MARGINAL_TOLERANCE
from tests.api.conftest import assert_problem

A = [[0.9, 0.0], [0.0, 0.8]]
B = [[1.0, 0.5, 0.2], [0.0, 1.0, 0.3]]
U0 = [25.0, 40.0, 60.0]  # reflux t/h, boil-up t/h, preheat %
Z0 = [95.0, 2.0]  # top purity %, bottom impurity %

COLUMN = {
    "model": {
        "kind": "state_space",
        "a": A,
        "b": B,
        "c": [[1.0, 0.0], [0.0, 1.0]],
        "inputs": [{"name": "reflux"}, {"name": "boilup"}, {"name": "feed_preheat"}],
        "outputs": [{"name": "top_purity"}, {"name": "bottom_purity"}],
        "sample_time": 1.0,
    },
    "horizons": {"prediction": 20, "control": 3},
    "weights": {"output": [1.0, 1.0], "move": [0.1, 0.1, 0.1], "input": [0.01, 0.01, 0.01]},
}


def _true_target(gain_factor, r, ut, s):
    """min |S^(1/2) (u - u_t)| over the true plant's steady states with C x = r (scipy lstsq)."""
    a, b = np.array(A), gain_factor * np.array(B)
    n, m = b.shape
    eq = np.block([[np.eye(n) - a, -b], [np.eye(n), np.zeros((n, m))]])
    rhs = np.concatenate([np.zeros(n), r])
    particular = scipy.linalg.lstsq(eq, rhs)[0]
    null = scipy.linalg.null_space(eq)
    v = np.diag(np.sqrt(s))
    z = scipy.linalg.lstsq(v @ null[n:], v @ (ut - particular[n:]))[0]
    return (particular + null @ z)[n:]


def test_input_weights_give_a_strictly_stable_loop_and_the_input_target_gain(client):
    body = client.post("/design", json=COLUMN).json()
    loop = body["closed_loop"]
    assert loop["stable"] is True and loop["marginal_modes"] == []
    assert loop["spectral_radius"] < 1.0 - 1e3 * MARGINAL_TOLERANCE
    assert not any(w["code"] == "free_input_direction" for w in body["warnings"])
    gain = body["gain"]
    kx, ku = np.array(gain["state"]), np.array(gain["previous_input"])
    a, b = np.array(A), np.array(B)
    m = np.block([[a - b @ kx, b @ (np.eye(3) - ku)], [-kx, np.eye(3) - ku]])
    assert abs(float(np.abs(np.linalg.eigvals(m)).max()) - loop["spectral_radius"]) < 1e-12
    kt = np.array(gain["input_target"])
    assert kt.shape == (3, 3) and np.any(kt)
    assert gain["labels"]["input_target"] == ["reflux.target", "boilup.target", "feed_preheat.target"]
    # Without input weights the same plant keeps its free input direction (and no Kt).
    plain = copy.deepcopy(COLUMN)
    del plain["weights"]["input"]
    other = client.post("/design", json=plain).json()
    assert other["gain"]["input_target"] is None
    assert [mode["cause"] for mode in other["closed_loop"]["marginal_modes"]] == ["free_input_direction"]


def test_absolute_run_with_gain_error_is_offset_free_and_inputs_settle_on_their_targets(client):
    request = copy.deepcopy(COLUMN)
    request["model"]["operating_point"] = {"inputs": U0, "outputs": Z0}
    true = copy.deepcopy(COLUMN["model"])
    true["b"] = (1.2 * np.array(B)).tolist()  # 20 % gain error
    r, ut = np.array([96.0, 1.5]), np.array([24.0, 41.0, 65.0])
    request["scenario"] = {
        "steps": 400,
        "setpoint_changes": [{"step": 5, "setpoint": r.tolist()}],
        "input_targets": ut.tolist(),
        "initial": {"input": U0, "setpoint": Z0},
        "true_plant": true,
    }
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    outputs, inputs = np.array(body["outputs"]), np.array(body["inputs"])
    assert np.abs(outputs[-1] - r).max() < 1e-6
    want = np.array(U0) + _true_target(1.2, r - np.array(Z0), ut - np.array(U0), np.full(3, 0.01))
    np.testing.assert_allclose(inputs[-1], want, rtol=0, atol=1e-6)
    assert body["whole_loop"]["stable"] is True


def test_a_target_outside_the_input_limits_is_allowed_and_reported(client):
    request = copy.deepcopy(COLUMN)
    request["limits"] = {"input_max": [5.0, 5.0, 0.5]}
    request["scenario"] = {
        "steps": 150,
        "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}],
        "input_targets": [0.0, 0.0, 2.0],
    }
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    warning = next(w for w in body["warnings"] if w["code"] == "input_target_outside_limits")
    assert "'feed_preheat'" in warning["message"]
    inputs = np.array(body["inputs"])
    assert inputs[:, 2].max() <= 0.5 + 1e-9
    assert np.abs(np.array(body["outputs"])[-1] - [1.0, -0.5]).max() < 1e-6


def test_input_targets_without_a_weight_are_reported_unused(client):
    request = copy.deepcopy(COLUMN)
    del request["weights"]["input"]
    request["scenario"] = {"steps": 20, "input_targets": [0.0, 0.0, 1.0]}
    body = client.post("/simulate", json=request).json()
    assert any(w["code"] == "input_targets_unused" and "weights.input" in w["message"] for w in body["warnings"])


def _problems(response):
    body = assert_problem(response, 422, "invalid-request")
    return {e["pointer"]: e["detail"] for e in body["errors"]}


def test_bad_input_weights_and_targets_are_422_naming_the_field(client):
    for weight, where in (
        ([0.1, 0.1], "/weights/input"),
        ([0.1, -1.0, 0.1], "/weights/input/1"),
        ([[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 1.0]], "/weights/input"),
    ):
        request = copy.deepcopy(COLUMN)
        request["weights"]["input"] = weight
        found = _problems(client.post("/design", json=request))
        assert where in found, found
    request = copy.deepcopy(COLUMN)
    request["scenario"] = {
        "steps": 10,
        "input_targets": [1.0, 2.0],
        "input_target_changes": [{"step": 12, "value": [1.0, 2.0, 3.0]}],
    }
    found = _problems(client.post("/simulate", json=request))
    assert "expected 3" in found["/scenario/input_targets"]
    assert "/scenario/input_target_changes/0/step" in found


def test_export_takes_the_input_targets_as_inputs_of_the_law(client):
    # The law run against /simulate is in tests/api/test_export_api.py ("three valves with
    # input targets"); here the labels and the gain on the targets.
    request = copy.deepcopy(COLUMN)
    request["format"] = "state_space"
    law = client.post("/design/export", json=request).json()
    names = [s["name"] for s in law["inputs"]]
    assert names[-3:] == ["reflux.target", "boilup.target", "feed_preheat.target"]
    assert [s["role"] for s in law["inputs"][-3:]] == ["input_target"] * 3
    d = np.array(law["d"]["values"])
    assert np.any(d[:3, -3:])  # the targets move the inputs


def test_loose_limits_with_blocked_moves_leave_the_run_as_it_is(client):
    # The move QP with the input pull (blocked moves take their own QP set-up): with limits that
    # never bind it answers the unconstrained optimum, so the run equals the run without limits
    # (the same cost; common practice).
    request = copy.deepcopy(COLUMN)
    request["horizons"] = {"prediction": 20, "control": 4, "move_steps": [0, 2]}
    request["scenario"] = {
        "steps": 120,
        "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}],
        "input_targets": [0.5, -0.2, 1.0],
    }
    free = client.post("/simulate", json=request).json()
    request["limits"] = {"input_min": [-100.0] * 3, "input_max": [100.0] * 3, "move_max": [50.0] * 3}
    limited = client.post("/simulate", json=request)
    assert limited.status_code == 200, limited.text
    np.testing.assert_allclose(np.array(limited.json()["inputs"]), np.array(free["inputs"]), rtol=0, atol=1e-9)
    assert np.abs(np.array(free["outputs"])[-1] - [1.0, -0.5]).max() < 1e-6
