"""POST /identify: the example plant test to a model that /design takes unchanged, and bad data."""

from __future__ import annotations

import copy

import pytest

from service.pipeline.examples import load_example
from tests.api.conftest import assert_problem

# The example's invented "true" plant (openapi/examples/make_plant_test.py).
TRUE = {
    ("vessel_temperature", "steam_valve"): (0.8, 12.0, 1.5),
    ("vessel_temperature", "outlet_valve"): (-0.15, 8.0, 0.5),
    ("vessel_level", "outlet_valve"): (-0.05, None, 0.3),
}


@pytest.fixture(scope="module")
def identified(client_module):
    request = load_example("identify_request.json")
    r = client_module.post("/identify", json=request)
    assert r.status_code == 200, r.text
    return r.json()


@pytest.fixture(scope="module")
def client_module():
    from fastapi.testclient import TestClient

    from service.api import Settings, create_app

    with TestClient(create_app(Settings()), raise_server_exceptions=False) as client:
        yield client


def test_example_plant_test_recovers_the_plant_and_designs(identified, client_module) -> None:
    body = identified
    model = body["model"]
    assert model["kind"] == "transfer_matrix"
    assert model["elements"][1][0] is None  # structure 'none' asked for
    for pair in body["pairs"]:
        key = (pair["output"], pair["input"])
        if key not in TRUE:
            continue
        gain, tau, theta = TRUE[key]
        values = {p["name"]: p for p in pair["parameters"]}
        # The example's small outlet moves give a signal-to-noise ratio near 6 on the temperature:
        # the truth lies within four reported standard errors (the 2 % checks are in the solver tests).
        for name, truth in (("gain", gain), ("time_constant", tau), ("dead_time", theta)):
            if truth is not None:
                estimate = values[name]
                assert abs(estimate["estimate"] - truth) < 4 * estimate["standard_error"], (key, name, estimate)
        assert values["gain"]["estimate"] == pytest.approx(gain, rel=0.05)
    assert body["operating_point"]["steam_valve"] == 40.0
    assert body["operating_point"]["vessel_temperature"] == pytest.approx(82.0, abs=0.05)
    for fit in body["fits"]:
        assert fit["estimation"]["nrmse_fit_percent"] > 90 and fit["validation"]["samples"] == 180
        assert fit["autocorrelation"]["bound"] == pytest.approx(2.576 / fit["estimation"]["samples"] ** 0.5)
    tags = {t["tag"]: t for t in body["data"]["tags"]}
    assert tags["vessel_temperature"]["missing"] == 2 and 300 in tags["vessel_temperature"]["first_outliers"]
    series = body["step_responses"][0]
    assert series["time"][0] == 0.0 and series["value"][0] == 0.0
    # Two requests: the answer's model goes to /design unchanged.
    design = load_example("design_request_transfer_matrix.json")
    design["model"] = model
    r = client_module.post("/design", json=design)
    assert r.status_code == 200, r.text
    assert r.json()["closed_loop"]["stable"]


def test_inputs_that_did_not_move_and_weak_ones_are_warned(client_module) -> None:
    request = load_example("identify_request.json")
    request["data"]["outlet_valve"] = [55.0] * len(request["data"]["outlet_valve"])
    r = client_module.post("/identify", json=request)
    assert r.status_code == 200, r.text
    codes = [w["code"] for w in r.json()["warnings"]]
    assert "input_did_not_move" in codes
    assert r.json()["model"]["elements"][0][1] is None


def test_bad_data_names_the_field(client_module) -> None:
    request = load_example("identify_request.json")
    missing = copy.deepcopy(request)
    del missing["data"]["steam_valve"]
    body = assert_problem(client_module.post("/identify", json=missing), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/inputs/0"
    ragged = copy.deepcopy(request)
    ragged["data"]["vessel_level"] = ragged["data"]["vessel_level"][:-3]
    body = assert_problem(client_module.post("/identify", json=ragged), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/data/vessel_level"
    backwards = copy.deepcopy(request)
    backwards["time"] = list(range(len(request["data"]["steam_valve"])))
    backwards["time"][5] = 3
    body = assert_problem(client_module.post("/identify", json=backwards), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/time/5"
    wrong = copy.deepcopy(request)
    wrong["pairs"][0]["structure"] = "first_order_dead_time"  # the level integrates
    body = assert_problem(client_module.post("/identify", json=wrong), 422, "invalid-request")
    assert body["errors"][0]["pointer"] == "/pairs/0/structure"
    text = copy.deepcopy(request)
    text["data"]["steam_valve"][3] = "open"
    assert_problem(client_module.post("/identify", json=text), 422, "invalid-request")
