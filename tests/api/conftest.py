"""Fixtures for the production-side API tests: apps built from explicit settings."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api import Settings, create_app

#: Keys of the tests: invented, long enough to pass the settings' length check.
KEY = "test-key-0123456789abcdef"
OTHER_KEY = "another-key-fedcba9876543210"


@pytest.fixture
def make_client() -> Iterator[Callable[..., TestClient]]:
    """Build a started test client from settings given as keyword arguments."""
    opened: list[TestClient] = []

    def make(**settings: Any) -> TestClient:
        client = TestClient(create_app(Settings(**settings)), raise_server_exceptions=False)
        client.__enter__()
        opened.append(client)
        return client

    yield make
    for client in opened:
        client.__exit__(None, None, None)


def assert_problem(response: Any, status: int, kind: str) -> dict[str, Any]:
    """The response is an RFC 9457 problem of that status and kind, with no traceback or path."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    assert body["status"] == status
    assert body["type"] == f"urn:movecast:problem:{kind}"
    assert {"title", "detail", "instance", "errors"} <= set(body)
    assert "Traceback" not in response.text and ".py" not in response.text
    assert "X-Request-ID" in response.headers
    return body


def invalid_fields(client: Any, path: str, body: Any) -> dict[str, str]:
    """POST ``body``; the answer must be a 422 problem: its fields' sentences by JSON pointer."""
    found = assert_problem(client.post(path, json=body), 422, "invalid-request")
    return {e["pointer"]: e["detail"] for e in found["errors"]}


def assert_field_problem(response: Any, status: int, pointer: str) -> dict[str, Any]:
    """The response is a problem of that status naming the field at ``pointer``, each field with a sentence."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    assert body["status"] == status and body["type"].startswith("urn:movecast:problem:")
    assert pointer in [e["pointer"] for e in body["errors"]], body
    assert all(e["detail"] for e in body["errors"])
    assert "Traceback" not in response.text and "/site-packages/" not in response.text
    return body
