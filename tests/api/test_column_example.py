"""The column of the README end to end: absolute units, a spare input, a level in a zone, model error.

The bundled example ``simulate_request_column.json`` (invented numbers) is run through
POST /simulate and checked against what a practitioner expects of it, each from the
request itself: offset-free compositions under a 20 % gain error (the offset-free conditions
of Pannocchia and Rawlings, AIChE J. 49 (2003) 426, for a detectable disturbance model with as
many disturbances as measured outputs), the level inside its zone at every sample, the spare
input at its target (the steady state puts the outputs first, then the inputs nearest their
targets), and the inputs inside their limits.
"""

from __future__ import annotations

import numpy as np

from service.pipeline.examples import load_example


def test_the_column_settles_offset_free_with_its_level_in_the_zone_and_its_spare_input_at_target(client):
    request = load_example("simulate_request_column.json")
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    answer = response.json()
    outputs, inputs = np.array(answer["outputs"]), np.array(answer["inputs"])
    point = request["model"]["operating_point"]
    scenario, limits = request["scenario"], request["limits"]

    # absolute units: the run starts at the operating point
    np.testing.assert_allclose(outputs[0], point["outputs"], atol=1e-9)
    # the compositions end on their setpoints despite the true plant's 20 % higher gains
    setpoint = scenario["setpoint_changes"][-1]["setpoint"]
    assert np.abs(outputs[-1, :2] - setpoint[:2]).max() < 1e-4
    # the level floats inside its zone at every sample, and the answer says so
    zone = request["zones"][2]
    level = outputs[:, 2]
    assert zone["low"] <= level.min() and level.max() <= zone["high"]
    report = answer["zones"][0]
    assert report["output"] == "sump_level" and report["fraction_inside"] == 1.0 and report["ended_inside"]
    # the spare input settles at its target; every input inside its limits (QP tolerance)
    assert abs(inputs[-1, 3] - scenario["input_targets"][3]) < 0.5
    assert np.all(inputs >= np.array(limits["input_min"]) - 1e-6)
    assert np.all(inputs <= np.array(limits["input_max"]) + 1e-6)
    # the design says what the gains alone do: the zone's integrator is a marginal mode, no instability
    design = answer["design"]
    causes = {m["cause"] for m in design["closed_loop"]["marginal_modes"]}
    assert causes == {"zone_output"}
    codes = {w["code"] for w in design["warnings"]} | {w["code"] for w in answer["warnings"]}
    assert "zone_outputs_not_in_gains" in codes
    assert not codes & {"unstable_closed_loop", "whole_loop_unstable", "setpoint_out_of_reach"}
    assert answer["diverged_at"] is None
