"""POST /design, /healthz and /readyz through the HTTP layer."""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.pipeline.caps import Caps
from service.pipeline.design import check_design_request
from service.schemas.design import DesignRequest
from service.solver.design.controller import design_controller
from tests.api.conftest import assert_field_problem


def test_design_answers_the_contract(client, example):
    r = client.post("/design", json=example)
    assert r.status_code == 200
    body = r.json()
    assert set(body["gain"]) >= {"horizon", "state", "previous_input", "setpoint"}
    assert set(body["hessian"]) == {"condition_number", "smallest_eigenvalue", "largest_eigenvalue", "size"}
    assert set(body["closed_loop"]) == {"poles", "spectral_radius", "stable", "marginal_modes"}
    assert set(body["closed_loop"]["poles"][0]) == {"real", "imag"}
    assert isinstance(body["warnings"], list) and body["fingerprint"].startswith("sha256:")
    assert "management-of-change" in body["advisory"]
    # The HTTP answer carries the solver's numbers unchanged (JSON floats round-trip exactly).
    inputs = check_design_request(DesignRequest.model_validate(example), Caps())
    d = design_controller(
        inputs.plant.a,
        inputs.plant.b,
        inputs.plant.c,
        output_weight=inputs.output_weight,
        move_weight=inputs.move_weight,
        prediction=30,
        control=5,
    )
    assert np.array_equal(np.array(body["gain"]["state"]), d.gain.state)
    assert np.array_equal(np.array(body["gain"]["horizon"]), d.gain.horizon)
    assert body["hessian"]["size"] == 10
    assert len(body["closed_loop"]["poles"]) == 6
    assert body["closed_loop"]["stable"] is True


def test_same_request_same_answer(client, example):
    first, second = client.post("/design", json=example).json(), client.post("/design", json=example).json()
    assert first == second


def test_health_and_readiness(client):
    assert client.get("/healthz").json()["status"] == "ok"
    r = client.get("/readyz")
    assert r.status_code == 200 and r.json()["status"] == "ready"


def test_readiness_is_false_outside_the_lifespan(example):
    from fastapi.testclient import TestClient

    from service.api import Settings, create_app

    app = create_app(Settings())
    client = TestClient(app)  # not entered: no startup has run
    assert client.get("/readyz").status_code == 503


@pytest.mark.parametrize(
    ("edit", "pointer"),
    [
        (lambda b: b["model"]["a"][2].pop(), "/model/a/2"),
        (lambda b: b["model"]["b"].pop(), "/model/b"),
        (lambda b: b["model"]["a"][1].__setitem__(0, "x"), "/model/a/1/0"),
        (lambda b: b["model"].__setitem__("sample_time", 0), "/model/sample_time"),
        (lambda b: b["model"].__setitem__("kind", "mystery"), "/model/kind"),
        (lambda b: b["horizons"].__setitem__("control", 50), "/horizons/control"),
        (lambda b: b["horizons"].__setitem__("first_penalized", 0), "/horizons/first_penalized"),
        (lambda b: b["weights"].__setitem__("output", [1.0, 2.0, 3.0]), "/weights/output"),
        (lambda b: b["weights"].__setitem__("move", [-0.1, 0.1]), "/weights/move/0"),
        (lambda b: b["weights"].__setitem__("outptu", [1.0]), "/weights/outptu"),
        (lambda b: b.pop("weights"), "/weights"),
    ],
)
def test_bad_input_is_a_422_naming_the_field(client, example, edit, pointer):
    edit(example)
    assert_field_problem(client.post("/design", json=example), 422, pointer)


@pytest.mark.parametrize(("kind", "says"), [(None, "this field is required"), ("mystery", "'mystery' is not a form")])
def test_a_missing_or_unknown_model_kind_lists_the_forms(client, example, kind, says):
    # The sentence names the field's purpose and the forms it takes, not the parser's words.
    if kind is None:
        del example["model"]["kind"]
    else:
        example["model"]["kind"] = kind
    body = client.post("/design", json=example).json()
    detail = next(e["detail"] for e in body["errors"] if e["pointer"] == "/model/kind")
    assert detail.startswith(says), detail
    assert all(f"'{form}'" in detail for form in ("state_space", "transfer_matrix", "step_response"))
    assert "discriminator" not in detail and "tag" not in detail


def test_singular_hessian_is_a_422_with_the_explanation(client, example):
    example["model"]["c"] = [[1.0, 0.0, 0.0, 0.0]]
    example["weights"] = {"output": [1.0], "move": [0.0, 0.0]}
    body = assert_field_problem(client.post("/design", json=example), 422, "/weights/move")
    assert body["type"] == "urn:movecast:problem:numerical-problem"
    assert "no move penalty" in body["detail"]


def test_malformed_json_is_a_400(client):
    r = client.post("/design", content=b'{"model": ', headers={"content-type": "application/json"})
    assert r.status_code == 400
    assert r.headers["content-type"].startswith("application/problem+json")


@pytest.mark.parametrize("body", [b"[]", b"null", b"3", b'"design"', b"{}"])
def test_a_body_that_is_not_a_request_object_is_a_422(client, body):
    r = client.post("/design", content=body, headers={"content-type": "application/json"})
    assert r.status_code == 422 and r.json()["errors"]


def test_nan_in_json_is_refused(client, example):
    raw = json.dumps(example).replace("0.92", "NaN", 1)
    r = client.post("/design", content=raw.encode(), headers={"content-type": "application/json"})
    assert_field_problem(r, 422, "/model/a/0/0")


def test_unknown_route_and_method_are_problem_details(client):
    assert client.get("/nowhere").status_code == 404
    r = client.get("/design")
    assert r.status_code == 405 and r.headers["content-type"].startswith("application/problem+json")


def test_openapi_carries_the_example_and_the_advisory(client, example):
    schema = client.get("/openapi.json").json()
    body = schema["paths"]["/design"]["post"]["requestBody"]["content"]["application/json"]
    assert body["examples"]["example_plant"]["value"] == example
    assert "Design aid only" in schema["info"]["description"]
