"""The contract: the committed OpenAPI document, its examples, the client example, fuzzing.

The fuzzing run uses schemathesis (its Python API against the ASGI app, no server): a bounded,
derandomized run of generated requests, valid and invalid, under every built-in check with none
excluded (no 5xx, status, content type, headers and schema conform to the document, invalid data
refused, valid data accepted, and the rest).
"""

from __future__ import annotations

import copy
import importlib
import importlib.util
import json
import pkgutil
import re
import sys
import tempfile
from pathlib import Path

import hypothesis
import jsonschema
import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from pydantic import BaseModel, ValidationError
from schemathesis.config import SchemathesisConfig

import service.schemas
from service.api import Settings, create_app
from service.pipeline.examples import load_example
from service.pipeline.identify_csv import identify_request_from_csv
from service.schemas.batch import BatchRequest
from service.schemas.design import DesignRequest
from service.schemas.identify_csv import IdentifyCsvOptions

ROOT = Path(__file__).resolve().parents[2]
COMMITTED = ROOT / "openapi" / "openapi.json"
EXAMPLES = ROOT / "openapi" / "examples"
REGENERATE = "movecast openapi --output openapi/openapi.json"

# Hypothesis keeps a cache beside the tests unless told otherwise; keep the checkout clean.
hypothesis.configuration.set_hypothesis_home_dir(tempfile.mkdtemp(prefix="movecast-hypothesis-"))


def served() -> dict:
    return create_app(Settings()).openapi()


def test_the_committed_document_is_the_served_schema():
    assert COMMITTED.is_file(), f"openapi/openapi.json is missing; create it with `{REGENERATE}`"
    committed = json.loads(COMMITTED.read_text(encoding="utf-8"))
    assert committed == served(), (
        f"openapi/openapi.json differs from the schema the app serves; regenerate it with `{REGENERATE}` "
        "and commit it (review the diff: a renamed or removed field breaks callers)"
    )


def _request_model(schema: dict) -> type[BaseModel]:
    """The request model a body schema refers to, found by name among the contract's models."""
    name = schema["$ref"].rsplit("/", 1)[-1]
    for module in pkgutil.iter_modules(service.schemas.__path__):
        found = getattr(importlib.import_module(f"service.schemas.{module.name}"), name, None)
        if isinstance(found, type) and issubclass(found, BaseModel):
            return found
    raise AssertionError(f"no request model named {name} in service.schemas")


def test_every_request_body_has_an_example_that_is_valid():
    checked = set()
    for path, operations in served()["paths"].items():
        for method, operation in operations.items():
            if "requestBody" not in operation:
                continue
            for media, content in operation["requestBody"]["content"].items():
                examples = content.get("examples") or {}
                assert examples, f"{method.upper()} {path} ({media}) has no example"
                if media == "text/csv":
                    # a plant-test CSV: it must read as an /identify request, with the tags of its header
                    for example in examples.values():
                        tags = example["value"].splitlines()[0].split(",")[1:]
                        options = IdentifyCsvOptions(sample_time=1.0, inputs=tags[0], outputs=",".join(tags[1:]))
                        request = identify_request_from_csv(example["value"].encode("utf-8"), options)
                        assert set(request.data) == set(tags), (path, sorted(request.data))
                    checked.add(path)
                    continue
                model = _request_model(content["schema"])
                for name, example in examples.items():
                    try:
                        model.model_validate(example["value"])
                    except ValidationError as exc:
                        pytest.fail(f"{method.upper()} {path}: example {name!r} is not a valid {model.__name__}: {exc}")
                checked.add(path)
    assert {"/design", "/design/batch", "/design/sweep", "/simulate", "/identify", "/identify/csv"} <= checked


def test_the_example_files_are_valid_requests():
    DesignRequest.model_validate(load_example("design_request.json"))
    batch = BatchRequest.model_validate(load_example("batch_request.json"))
    for item in batch.items:
        DesignRequest.model_validate(item.request)


def test_curl_examples_cover_every_endpoint():
    text = (EXAMPLES / "curl.md").read_text(encoding="utf-8")
    headings = set(re.findall(r"^## (GET|POST) (\S+)$", text, flags=re.M))
    endpoints = {(m.upper(), p) for p, ops in served()["paths"].items() for m in ops}
    assert endpoints | {("GET", "/metrics"), ("GET", "/openapi.json")} <= headings, endpoints - headings
    for _method, path in headings:
        assert f"http://127.0.0.1:8000{path}" in text, path
    for name in re.findall(r"@openapi/examples/(\S+)", text):
        assert (EXAMPLES / name).is_file(), name


def _client_module():
    spec = importlib.util.spec_from_file_location("movecast_client_example", EXAMPLES / "client.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up
    spec.loader.exec_module(module)
    return module


def test_the_client_example_works_against_the_app(make_client, example):
    client_module = _client_module()
    key = "client-example-key-0123456789"
    http = make_client(api_keys=key)
    with client_module.MovecastClient(api_key=key, http=http) as client:
        assert client.healthy() and client.ready()
        design = client.design(example)
        assert design == http.post("/design", json=example, headers={"Authorization": f"Bearer {key}"}).json()
        assert design["closed_loop"]["stable"] is True
        bad = copy.deepcopy(example)
        bad["model"]["a"][2].pop()
        items = [
            {"id": "ok", "request": example, "known_fingerprint": design["fingerprint"]},
            {"id": "bad", "request": bad},
        ]
        same, failed = client.design_batch(items)
        assert (same["status"], failed["status"]) == ("unchanged", "failed")
        assert failed["problem"]["errors"][0]["pointer"].startswith("/items/1/request/model/a")
        with pytest.raises(client_module.ProblemError) as caught:
            client.design(bad)
        assert caught.value.status == 422 and caught.value.errors[0]["pointer"] == "/model/a/2"
        assert caught.value.request_id
    with client_module.MovecastClient(http=http) as anonymous:
        with pytest.raises(client_module.ProblemError) as caught:
            anonymous.design(example)
        assert caught.value.status == 401


def test_the_client_example_identifies_from_json_and_csv(make_client):
    client_module = _client_module()
    with client_module.MovecastClient(http=make_client()) as client:
        from_json = client.identify(load_example("identify_request.json"))
        csv = (EXAMPLES / "plant_test.csv").read_bytes()
        from tests.api.test_identify_csv import QUERY  # the choices that fit the bundled CSV

        from_csv = client.identify_csv(csv, **QUERY)
        assert from_csv["model"] == from_json["model"] and from_json["model"]["operating_point"]
        with pytest.raises(client_module.ProblemError) as caught:
            client.identify_csv(csv, **{**QUERY, "inputs": "no_such_tag"})
        assert caught.value.status == 422 and caught.value.errors[0]["pointer"] == "/inputs"


# --------------------------------------------------------------------------- fuzzing

FUZZ_APP = create_app(Settings())
#: Every built-in check, none excluded, on valid and invalid requests alike.  One setting: a
#: request valid by the schema may still break a rule JSON Schema cannot state (A square, B with
#: as many rows as A, weights sized to the signals, caps from the settings); those are answered
#: 422 naming the field, which the positive-data check is told to accept.
FUZZ_CONFIG = SchemathesisConfig.from_dict(
    {
        "generation": {"mode": "all"},
        "checks": {"positive_data_acceptance": {"expected-statuses": ["2xx", "401", "404", "422"]}},
    }
)
FUZZ_SCHEMA = schemathesis.openapi.from_asgi("/openapi.json", FUZZ_APP, config=FUZZ_CONFIG)


@FUZZ_SCHEMA.parametrize()
@hypothesis.seed(20261201)
@settings(
    max_examples=15,
    derandomize=True,
    deadline=None,
    database=None,
    suppress_health_check=list(HealthCheck),
)
def test_fuzzed_requests_get_no_server_error_and_conform_to_the_schema(case):
    case.call_and_validate()  # every check enabled in the configuration: all of them


# --------------------------------------------------------------------------- answers against the document

#: Every bundled example file with the route it is posted to (openapi/examples/README.md).
EXAMPLE_ROUTES = {
    "design_request.json": "/design",
    "design_request_robustness.json": "/design",
    "design_request_transfer_matrix.json": "/design",
    "batch_request.json": "/design/batch",
    "sweep_request.json": "/design/sweep",
    "simulate_request.json": "/simulate",
    "simulate_request_limits.json": "/simulate",
    "simulate_request_column.json": "/simulate",
    "simulate_request_measured.json": "/simulate",
    "compare_request.json": "/design/compare",
    "export_request.json": "/design/export",
    "export_request_structured_text.json": "/design/export",
    "identify_request.json": "/identify",
}
#: The choices of the CSV calls of README.md and curl.md.
CSV_QUERIES = {
    "/identify": "sample_time=1&inputs=steam_valve,outlet_valve&outputs=vessel_temperature,vessel_level"
    "&disturbances=inlet_flow&integrating=vessel_level&pairs=vessel_level:steam_valve:none&max_dead_time=20",
    "/identify/csv": "sample_time=1&inputs=steam_valve&outputs=vessel_temperature",
}
#: An RFC 6901 JSON pointer.
JSON_POINTER = re.compile(r"(/([^~/]|~[01])*)*")


def assert_answer_conforms(document: dict, path: str, method: str, response) -> None:
    """The answer's status and media type are documented for the operation, and its body fits their schema.

    JSON bodies are validated with ``jsonschema`` (JSON Schema 2020-12, the dialect of OpenAPI 3.1)
    against the committed document, its components included; a problem's fields must be JSON pointers.
    """
    responses = document["paths"][path.split("?")[0]][method]["responses"]
    status = str(response.status_code)
    assert status in responses, f"{method.upper()} {path}: status {status} is not documented"
    media = response.headers["content-type"].split(";")[0]
    content = responses[status].get("content", {})
    assert media in content, f"{method.upper()} {path} {status}: {media} is not documented (only {list(content)})"
    schema = content[media].get("schema")
    assert schema is not None, f"{method.upper()} {path} {status} {media}: no schema"
    body = response.json() if media.endswith("json") else response.text
    validator = jsonschema.Draft202012Validator({**schema, "components": document["components"]})
    problems = [f"/{'/'.join(map(str, e.absolute_path))}: {e.message[:300]}" for e in validator.iter_errors(body)]
    assert not problems, f"{method.upper()} {path} {status}: {problems[:5]}"
    if media == "application/problem+json":
        assert body["status"] == response.status_code
        for entry in body["errors"]:
            assert JSON_POINTER.fullmatch(entry["pointer"]), entry
        if response.status_code == 422:
            assert body["errors"] and all(e["detail"] for e in body["errors"]), body


def test_every_example_answer_conforms_to_the_committed_document(client):
    document = json.loads(COMMITTED.read_text(encoding="utf-8"))
    assert set(EXAMPLE_ROUTES) == {p.name for p in EXAMPLES.glob("*.json")}, "a bundled example without its route here"
    json_body = {"Content-Type": "application/json"}
    for name, path in EXAMPLE_ROUTES.items():
        body = (EXAMPLES / name).read_bytes()
        response = client.post(path, content=body, headers=json_body)
        assert response.status_code == 200, (name, response.text[:500])
        assert_answer_conforms(document, path, "post", response)
    for path, accept in (("/simulate", "text/csv"), ("/design/compare", "text/markdown")):
        name = next(n for n, p in EXAMPLE_ROUTES.items() if p == path)
        response = client.post(path, content=(EXAMPLES / name).read_bytes(), headers={**json_body, "Accept": accept})
        assert response.status_code == 200 and response.headers["content-type"].startswith(accept)
        assert_answer_conforms(document, path, "post", response)
    csv = (EXAMPLES / "plant_test.csv").read_bytes()
    for path, query in CSV_QUERIES.items():
        response = client.post(f"{path}?{query}", content=csv, headers={"Content-Type": "text/csv"})
        assert response.status_code == 200, response.text[:500]
        assert_answer_conforms(document, path, "post", response)
    for path in ("/healthz", "/readyz"):
        response = client.get(path)
        assert response.status_code == 200
        assert_answer_conforms(document, path, "get", response)


@pytest.mark.parametrize("path", sorted(set(EXAMPLE_ROUTES.values())))
def test_bad_requests_get_documented_problems_that_conform(make_client, path):
    document = json.loads(COMMITTED.read_text(encoding="utf-8"))
    example = json.loads((EXAMPLES / next(n for n, p in EXAMPLE_ROUTES.items() if p == path)).read_text())
    client = make_client(max_body_bytes=200_000)
    json_body = {"Content-Type": "application/json"}
    crowded = {**example, **{f"extra_{i}": 1 for i in range(60)}}  # more bad fields than a problem lists
    bad = [
        (400, {"content": b'{"model": ', "headers": json_body}),  # not JSON
        (400, {"content": b'{"\xff": 1}', "headers": json_body}),  # not UTF-8
        (415, {"content": json.dumps(example).encode(), "headers": {"Content-Type": "text/plain"}}),
        (415, {"content": json.dumps(example).encode(), "headers": {**json_body, "Content-Encoding": "gzip"}}),
        (413, {"content": b'{"x": "' + b"a" * 300_000 + b'"}', "headers": json_body}),
        (422, {"json": {}}),
        (422, {"json": [1]}),
        (422, {"json": {**example, "surprise": 1}}),
        (422, {"content": b'{"a": 1, "a": 2}', "headers": json_body}),
        (422, {"json": crowded}),
    ]
    for status, request in bad:
        response = client.post(path, **request)
        assert response.status_code == status, (status, response.text[:300])
        assert_answer_conforms(document, path, "post", response)
    assert client.post(path, json=crowded).json()["omitted_errors"] == 10
    keyed = make_client(api_keys="contract-test-key-0123456789")
    response = keyed.post(path, json=example)
    assert response.status_code == 401
    assert_answer_conforms(document, path, "post", response)


def test_the_documents_own_request_examples_get_answers_that_conform(client):
    document = json.loads(COMMITTED.read_text(encoding="utf-8"))
    posted = 0
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            for media, content in operation.get("requestBody", {}).get("content", {}).items():
                for name, example in (content.get("examples") or {}).items():
                    if media == "text/csv":  # the choices go in the query: the tags of its header
                        tags = example["value"].splitlines()[0].split(",")[1:]
                        query = f"sample_time=1&inputs={tags[0]}&outputs={','.join(tags[1:])}"
                        response = client.post(
                            f"{path}?{query}", content=example["value"].encode(), headers={"Content-Type": media}
                        )
                    else:
                        response = client.request(method.upper(), path, json=example["value"])
                    assert response.status_code == 200, (path, name, response.text[:300])
                    assert_answer_conforms(document, path, method, response)
                    posted += 1
    assert posted >= 12
