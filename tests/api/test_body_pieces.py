"""Large response bodies reach the server in pieces, the same bytes and headers (BodyChunkMiddleware)."""

from __future__ import annotations

import asyncio

import numpy as np
import pytest

from service.api.middleware import BODY_CHUNK_BYTES, BodyChunkMiddleware
from tests.conftest import random_design_request


def sent_messages(messages: list[dict], *, chunk_bytes: int) -> list[dict]:
    """What the server receives when an app sends ``messages`` through the middleware."""

    async def app(scope, receive, send):
        for message in messages:
            await send(message)

    got: list[dict] = []

    async def send(message):
        got.append(message)

    async def receive():
        return {"type": "http.disconnect"}

    scope = {"type": "http", "method": "GET", "path": "/"}
    asyncio.run(BodyChunkMiddleware(app, chunk_bytes=chunk_bytes)(scope, receive, send))
    return got


START = {"type": "http.response.start", "status": 200, "headers": [(b"content-length", b"10")]}


@pytest.mark.parametrize("length", [0, 1, 9, 10, 11, 25, 30])
def test_a_body_is_split_into_pieces_of_at_most_the_chunk_size_with_the_same_bytes(length):
    body = bytes(range(256)) * 2
    body = body[:length]
    got = sent_messages([START, {"type": "http.response.body", "body": body}], chunk_bytes=10)
    assert got[0] is START  # the start message, headers and all, passes untouched
    pieces = got[1:]
    assert b"".join(p["body"] for p in pieces) == body
    assert all(isinstance(p["body"], bytes) and len(p["body"]) <= 10 for p in pieces)
    assert [p.get("more_body", False) for p in pieces] == [True] * (len(pieces) - 1) + [False]
    assert len(pieces) == max(1, -(-length // 10))


def test_a_streamed_body_keeps_its_more_body_flags():
    messages = [
        START,
        {"type": "http.response.body", "body": b"a" * 25, "more_body": True},
        {"type": "http.response.body", "body": b"b" * 5, "more_body": False},
    ]
    got = sent_messages(messages, chunk_bytes=10)
    assert b"".join(m["body"] for m in got[1:]) == b"a" * 25 + b"b" * 5
    assert [m.get("more_body", False) for m in got[1:]] == [True, True, True, False]


def test_a_large_answer_arrives_whole_over_http(make_client):
    # A real app: a /design answer larger than one piece (a plant with many outputs over a long
    # horizon) arrives byte for byte, with its Content-Length, whether computed or from the cache.
    signals = 40
    body = random_design_request(np.random.default_rng(11), states=6, signals=signals, prediction=200, control=1)
    client = make_client(answer_cache_bytes=256 * 1024 * 1024)  # room for an answer this size
    first = client.post("/design", json=body)
    assert first.status_code == 200, first.text
    assert len(first.content) > 2 * BODY_CHUNK_BYTES
    assert int(first.headers["content-length"]) == len(first.content)
    answer = first.json()
    assert len(answer["gain"]["horizon"]) == signals
    again = client.post("/design", json=body)
    assert again.headers["cache-status"] == "movecast; hit"
    assert again.content == first.content


def test_the_pieces_are_cut_outside_every_other_middleware(make_client):
    # Outermost of the service's middleware, so the request context (its problem peek, its
    # access line), CORS, the key check and the answer cache all see the body as sent.
    from service.api.middleware import RequestContextMiddleware

    client = make_client()
    client.get("/healthz")  # builds the stack
    layers = []
    layer = client.app.middleware_stack
    while layer is not None:
        layers.append(type(layer))
        layer = getattr(layer, "app", None)
    assert BodyChunkMiddleware in layers and RequestContextMiddleware in layers
    assert layers.index(BodyChunkMiddleware) < layers.index(RequestContextMiddleware)
