"""Offset-free tracking on a 3 x 4 column with an integrating level, under 20 % gain error.

Our own scenario (invented numbers, absolute engineering units by an operating point): a column
with top purity, bottom impurity and sump level (integrating), four inputs (reflux, boil-up,
bottoms flow, feed preheat; one spare direction), dead times of 1 to 5 samples, the default
estimator, and a true plant whose every gain is 20 % higher than the model's, plus an
unmeasured step on the boil-up.

References: offset-free estimation with as many step disturbances as controlled outputs and a
detectable augmented model (Muske and Badgwell, J. Process Control 12, 2002; Pannocchia and
Rawlings, AIChE J. 49, 2003) makes the outputs settle on their setpoints whatever the gain
error, as long as the loop on the true plant settles; and the true plant's own steady state,
computed by hand from its gains: the self-regulating outputs move by ``K (u + d - u0)`` and the
level's rate ``k (u + d - u0)`` is zero.
"""

from __future__ import annotations

import copy

import numpy as np

OPERATING_INPUTS = [45.0, 50.0, 20.0, 1200.0]  # t/h, t/h, t/h, kW
OPERATING_OUTPUTS = [98.5, 2.0, 50.0]  # %, %, %
SETPOINT = [99.0, 1.5, 55.0]
BOILUP_STEP = [0.0, 2.0, 0.0, 0.0]  # an unmeasured 2 t/h on the boil-up
GAIN_ERROR = 1.2
#: The steady-state gains (and rates of the level row) of the elements below.
GAINS = np.array([[0.6, -0.4, 0.0, 0.002], [-0.3, 0.5, 0.0, -0.001], [0.02, -0.03, -0.05, 0.0]])


def _element(gain, time_constants=None, dead_time=0.0, integrating=False):
    out = {"gain": gain, "dead_time": dead_time, "integrating": integrating}
    if time_constants:
        out["time_constants"] = time_constants
    return out


def _elements(factor=1.0):
    e = _element
    rows = [
        [e(0.6, [15.0], 2.0), e(-0.4, [12.0], 3.0), None, e(0.002, [20.0], 4.0)],
        [e(-0.3, [18.0], 3.0), e(0.5, [10.0], 2.0), None, e(-0.001, [25.0], 5.0)],
        [e(0.02, None, 1.0, True), e(-0.03, None, 1.0, True), e(-0.05, None, 0.0, True), None],
    ]
    for row in rows:
        for element in row:
            if element is not None:
                element["gain"] *= factor
    return rows


MODEL = {
    "kind": "transfer_matrix",
    "elements": _elements(),
    "sample_time": 1.0,
    "inputs": [
        {"name": "reflux", "unit": "t/h", "span": 20.0},
        {"name": "boilup", "unit": "t/h", "span": 20.0},
        {"name": "bottoms_flow", "unit": "t/h", "span": 10.0},
        {"name": "feed_preheat", "unit": "kW", "span": 500.0},
    ],
    "outputs": [
        {"name": "top_purity", "unit": "%", "span": 2.0},
        {"name": "bottom_impurity", "unit": "%", "span": 2.0},
        {"name": "sump_level", "unit": "%", "span": 50.0},
    ],
    "operating_point": {"inputs": OPERATING_INPUTS, "outputs": OPERATING_OUTPUTS},
}


def test_offset_free_under_20_percent_gain_error_with_the_default_estimator(client):
    true_plant = copy.deepcopy(MODEL)
    del true_plant["operating_point"]  # it runs around the model's
    true_plant["elements"] = _elements(GAIN_ERROR)
    request = {
        "model": MODEL,
        "horizons": {"prediction": 60, "control": 5},
        "weights": {"output": [1.0, 1.0, 0.5], "move": [1.0, 1.0, 1.0, 1.0]},
        "scenario": {
            "steps": 1000,
            "setpoint_changes": [{"step": 10, "setpoint": SETPOINT}],
            "input_disturbances": [{"step": 300, "value": BOILUP_STEP}],
            "true_plant": true_plant,
        },
    }
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    # The default estimator: a bias on each composition, a bias on the level's rate.
    assert body["estimator"]["kind"] == "per_output"
    assert body["estimator"]["disturbances"] == ["output", "output", "rate"]
    assert body["diverged_at"] is None
    assert body["true_loop"]["spectral_radius"] < 1.0 + 1e-6  # the spare direction sits at 1
    outputs = np.array(body["outputs"])
    # Offset below 1e-6 (absolute units), and settled.
    np.testing.assert_allclose(outputs[-1], SETPOINT, rtol=0.0, atol=1e-6)
    assert np.abs(outputs[-100:] - outputs[-1]).max() < 1e-6
    # The inputs reached the true plant's own steady state for these setpoints.
    moved = np.array(body["inputs"])[-1] + np.array(BOILUP_STEP) - np.array(OPERATING_INPUTS)
    reached = GAIN_ERROR * GAINS @ moved
    target = np.array(SETPOINT) - np.array(OPERATING_OUTPUTS)
    target[2] = 0.0  # the level settles when its rate is zero
    np.testing.assert_allclose(reached, target, rtol=0.0, atol=1e-6)
