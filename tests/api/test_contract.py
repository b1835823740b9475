"""The contract: the committed OpenAPI document, its examples, the client example, fuzzing.

The fuzzing run uses schemathesis (its Python API against the ASGI app, no server): a bounded,
derandomized run of a few hundred generated requests, valid and invalid, checking that none
gets a 5xx and that every response conforms to the document (status, content type, schema).
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
import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from pydantic import BaseModel, ValidationError
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

import service.schemas
from service.api import Settings, create_app
from service.pipeline.examples import load_example
from service.schemas.batch import BatchRequest
from service.schemas.design import DesignRequest

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
                model = _request_model(content["schema"])
                for name, example in examples.items():
                    try:
                        model.model_validate(example["value"])
                    except ValidationError as exc:
                        pytest.fail(f"{method.upper()} {path}: example {name!r} is not a valid {model.__name__}: {exc}")
                checked.add(path)
    assert {"/design", "/design/batch", "/design/sweep", "/simulate"} <= checked


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


# --------------------------------------------------------------------------- fuzzing

FUZZ_APP = create_app(Settings())
FUZZ_SCHEMA = schemathesis.openapi.from_asgi("/openapi.json", FUZZ_APP)
CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance, response_schema_conformance]


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
    case.call_and_validate(checks=CHECKS)
