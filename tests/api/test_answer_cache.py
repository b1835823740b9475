"""The answer cache: a request repeated byte for byte gets the same bytes without a second computation."""

from __future__ import annotations

import copy
import json

import pytest

from service.api.answer_cache import AnswerCache, StoredAnswer, answer_key
from service.api.bodies import INLINE_BODY_BYTES
from service.pipeline.examples import load_example
from tests.api.conftest import KEY, assert_problem
from tests.api.test_metrics import samples, value

JSON = {"content-type": "application/json"}


def solver_calls(client) -> float:
    """Solver calls of both lanes so far (``movecast_solver_lane_calls_total``)."""
    found = samples(client)
    return sum(value(found, "movecast_solver_lane_calls_total", lane=lane) for lane in ("light", "heavy"))


def post(client, path: str, body: dict, **headers: str):
    return client.post(path, content=json.dumps(body).encode(), headers={**JSON, **headers})


def test_a_repeated_design_is_answered_from_the_cache_with_the_same_bytes(make_client, example):
    client = make_client()
    calls = solver_calls(client)
    before = samples(client)  # the counters are the process's: other tests' requests count too
    first = post(client, "/design", example)
    second = post(client, "/design", example)
    assert first.status_code == second.status_code == 200
    assert first.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert second.headers["cache-status"] == "movecast; hit"  # RFC 9211 syntax
    assert second.content == first.content
    assert second.headers["content-type"] == first.headers["content-type"] == "application/json"
    assert second.headers["content-length"] == str(len(first.content))
    assert second.headers["x-request-id"] != first.headers["x-request-id"]  # each request is its own
    assert solver_calls(client) - calls == 1  # the repeat never reached a solver
    found = samples(client)
    for outcome in ("hit", "miss"):
        counted = value(found, "movecast_answer_cache_lookups_total", route="/design", outcome=outcome)
        assert counted - value(before, "movecast_answer_cache_lookups_total", route="/design", outcome=outcome) == 1


def test_the_cached_answer_equals_a_fresh_computation(make_client, example):
    cached = make_client()
    post(cached, "/design", example)
    repeat = post(cached, "/design", example)
    fresh = post(make_client(answer_cache_bytes=0), "/design", example)
    assert repeat.headers["cache-status"] == "movecast; hit"
    assert "cache-status" not in fresh.headers  # turned off: no cache, no header
    assert repeat.content == fresh.content


def test_any_change_to_the_body_or_its_negotiation_is_computed_afresh(make_client, example):
    client = make_client()
    post(client, "/design", example)
    changed = copy.deepcopy(example)
    changed["weights"]["move"][0] *= 1.5
    other = post(client, "/design", changed)
    assert other.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert other.json()["gain"] != post(client, "/design", example).json()["gain"]
    # The same numbers written differently (spacing) are another request: the key is the bytes.
    spaced = client.post("/design", content=json.dumps(example, indent=1).encode(), headers=JSON)
    assert spaced.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert spaced.json() == post(client, "/design", example).json()


def test_the_accept_header_chooses_its_own_answer(make_client):
    client = make_client()
    body = load_example("compare_request.json")
    as_json = post(client, "/design/compare", body)
    as_markdown = post(client, "/design/compare", body, accept="text/markdown")
    again = post(client, "/design/compare", body, accept="text/markdown")
    assert as_json.headers["content-type"].startswith("application/json")
    assert as_markdown.headers["content-type"].startswith("text/markdown")
    assert as_markdown.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert again.headers["cache-status"] == "movecast; hit"
    assert again.content == as_markdown.content and again.headers["content-type"] == as_markdown.headers["content-type"]
    simulate = load_example("simulate_request.json")
    run_json = post(client, "/simulate", simulate)
    run_csv = post(client, "/simulate", simulate, accept="text/csv")
    assert run_csv.headers["content-type"].startswith("text/csv") and run_json.content != run_csv.content
    assert post(client, "/simulate", simulate, accept="text/csv").content == run_csv.content


def test_refusals_are_never_kept(make_client, example):
    client = make_client()
    bad = copy.deepcopy(example)
    bad["horizons"]["control"] = 0
    for _ in range(2):
        answer = post(client, "/design", bad)
        assert_problem(answer, 422, "invalid-request")
        assert "cache-status" not in answer.headers


def test_a_batch_is_always_computed(make_client):
    # Its items may report a time limit inside a 200: that depends on the load, not the request.
    client = make_client()
    body = load_example("batch_request.json")
    calls = solver_calls(client)
    first, second = post(client, "/design/batch", body), post(client, "/design/batch", body)
    assert first.status_code == second.status_code == 200
    assert "cache-status" not in first.headers and "cache-status" not in second.headers
    designed = sum(item["status"] == "designed" for item in first.json()["items"])
    assert solver_calls(client) - calls == 2 * designed


def test_a_cached_answer_still_needs_the_key(make_client, example):
    client = make_client(api_keys=KEY)
    bearer = {"authorization": f"Bearer {KEY}"}
    assert post(client, "/design", example, **bearer).status_code == 200
    assert post(client, "/design", example, **bearer).headers["cache-status"] == "movecast; hit"
    refused = post(client, "/design", example)
    assert_problem(refused, 401, "unauthorized")
    assert "cache-status" not in refused.headers


def store(body: bytes) -> StoredAnswer:
    return StoredAnswer(body, ((b"content-type", b"application/json"),))


def test_the_cache_holds_at_most_its_capacity_and_drops_the_least_recently_used():
    cache = AnswerCache(capacity=64 * 1024)
    keys = [answer_key("/design", b"", (), str(k).encode()) for k in range(40)]
    for key in keys:
        assert cache.put(key, store(b"x" * 3000))
        assert cache.held <= cache.capacity
    assert len(cache) < 40
    assert cache.get(keys[0]) is None  # the oldest went first
    newest = keys[-1]
    assert cache.get(newest) is not None
    # Reading an entry makes it the most recent: it outlives entries stored before it was read.
    kept = [k for k in keys if cache.get(k) is not None]
    cache.get(kept[0])
    cache.put(answer_key("/design", b"", (), b"one more"), store(b"y" * 3000))
    assert cache.get(kept[0]) is not None and cache.get(kept[1]) is None
    cache.clear()
    assert len(cache) == 0 and cache.held == 0


def test_an_answer_above_a_sixteenth_of_the_cache_is_not_kept():
    cache = AnswerCache(capacity=16 * 10_000)
    key = answer_key("/design", b"", (), b"{}")
    assert not cache.put(key, store(b"z" * 10_000))
    assert cache.get(key) is None and cache.held == 0
    assert not AnswerCache(capacity=0).put(key, store(b""))


@pytest.mark.parametrize(
    ("one", "other"),
    [
        (("/design", b"", (), b"ab"), ("/designa", b"", (), b"b")),  # parts cannot run together
        (("/design", b"a=1", (), b""), ("/design", b"", (), b"a=1")),
        (("/design", b"", (("accept", "text/csv"),), b"{}"), ("/design", b"", (("accept", ""),), b"{}")),
    ],
)
def test_keys_tell_apart_requests_that_differ_in_any_part(one, other):
    assert answer_key(*one) != answer_key(*other)
    assert answer_key(*one) == answer_key(*one)


def test_cache_control_asks_for_the_computation_again(make_client, example):
    # RFC 9111, 5.2.1.4 and 5.2.1.5: no-cache must not be answered from the cache without a
    # new computation; no-store must not be kept.
    client = make_client()
    post(client, "/design", example)
    calls = solver_calls(client)
    again = post(client, "/design", example, **{"cache-control": "no-cache"})
    assert again.headers["cache-status"] == "movecast; fwd=request; stored"
    assert solver_calls(client) - calls == 1
    changed = copy.deepcopy(example)
    changed["weights"]["move"][0] *= 2.0
    unkept = post(client, "/design", changed, **{"cache-control": "max-age=0, No-Store"})
    assert unkept.headers["cache-status"] == "movecast; fwd=request"
    assert post(client, "/design", changed).headers["cache-status"] == "movecast; fwd=miss; stored"
    assert post(client, "/design", changed).headers["cache-status"] == "movecast; hit"


def test_a_large_csv_body_is_keyed_with_its_query(make_client):
    # The plant test is 25 KB, above the inline size: its key is computed off the event loop.
    from tests.api.test_identify_csv import QUERY, csv_body

    client = make_client()
    body = csv_body()
    assert len(body) > INLINE_BODY_BYTES
    csv = {"content-type": "text/csv"}
    first = client.post("/identify", params=QUERY, content=body, headers=csv)
    second = client.post("/identify", params=QUERY, content=body, headers=csv)
    assert first.status_code == 200 and first.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert second.headers["cache-status"] == "movecast; hit" and second.content == first.content
    other = client.post("/identify", params={**QUERY, "sample_time": 2.0}, content=body, headers=csv)
    assert other.headers["cache-status"] == "movecast; fwd=miss; stored"
    assert other.json()["model"] != first.json()["model"]
