"""POST /identify with structure 'subspace': a state-space model that /design takes unchanged."""

from __future__ import annotations

import numpy as np
import scipy.signal

from service.pipeline.examples import load_example
from service.solver.models.transfer import TransferElement, transfer_matrix_model
from tests.api.conftest import assert_problem


def complete_request() -> dict:
    """The example plant test with its gaps and spike repaired by hand (a subspace fit needs every sample)."""
    request = load_example("identify_request.json")
    temperature = request["data"]["vessel_temperature"]
    temperature[410] = temperature[411] = temperature[409]
    temperature[300] = temperature[299]
    request.update(structure="subspace", outlier_limit=None, pairs=[], integrating=[], order=4)
    return request


def test_subspace_model_designs_and_matches_the_plant(client) -> None:
    r = client.post("/identify", json=complete_request())
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["model"]["kind"] == "state_space" and body["subspace"]["order"] == 4
    assert body["subspace"]["singular_values"] == sorted(body["subspace"]["singular_values"], reverse=True)
    # The steam valve's step on the temperature against the example's invented plant
    # (0.8 e^(-1.5 s)/(12 s + 1), sampled exactly): within 5 % of the gain over 40 minutes.
    sampled = transfer_matrix_model([[TransferElement(0.8, (12.0,), 1.5)]], sample_time=1.0)
    _, truth, _ = scipy.signal.dlsim((sampled.a, sampled.b, sampled.c, sampled.d, 1.0), np.ones((41, 1)))
    series = next(
        s for s in body["step_responses"] if s["input"] == "steam_valve" and s["output"] == "vessel_temperature"
    )
    np.testing.assert_allclose(series["value"][:41], truth[:, 0], atol=0.05 * 0.8)
    assert body["fits"][0]["validation"]["nrmse_fit_percent"] > 80
    assert body["model"]["operating_point"]["inputs"][0] == 40.0 and "operating_point" not in body
    design = load_example("design_request_transfer_matrix.json")
    design["model"] = body["model"]
    design["estimator"] = {"kind": "input_disturbance"}
    answer = client.post("/design", json=design)
    assert answer.status_code == 200, answer.text


def test_subspace_refuses_gaps(client) -> None:
    request = complete_request()
    request["data"]["vessel_level"][17] = None
    body = assert_problem(client.post("/identify", json=request), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/data/vessel_level/17"
    short = complete_request()
    short["block_rows"] = 200
    body = assert_problem(client.post("/identify", json=short), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/block_rows"
