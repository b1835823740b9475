"""POST /design/batch: items answered on their own, in order, with fingerprints to skip work."""

from __future__ import annotations

import copy

import pytest

from service.pipeline.examples import load_example
from tests.api.conftest import assert_problem
from tests.api.test_request_caps import slow_request


def _item(item_id, request, **extra):
    return {"id": item_id, "request": request, **extra}


def test_the_bundled_batch_example_is_answered_in_order(client):
    batch = load_example("batch_request.json")
    r = client.post("/design/batch", json=batch)
    assert r.status_code == 200, r.text
    items = r.json()["items"]
    assert [i["id"] for i in items] == [i["id"] for i in batch["items"]]
    assert [i["status"] for i in items] == ["designed", "designed"]  # the example's known fingerprint is stale


def test_each_result_equals_the_single_design_bit_for_bit(client, example):
    other = copy.deepcopy(example)
    other["horizons"]["prediction"] = 40
    r = client.post("/design/batch", json={"items": [_item("a", example), _item("b", other)]})
    items = r.json()["items"]
    for item, request in zip(items, (example, other), strict=False):
        single = client.post("/design", json=request).json()
        assert item["result"] == single  # JSON floats round-trip exactly: equal dicts, equal bits
        assert item["fingerprint"] == single["fingerprint"] and item["problem"] is None


def test_a_bad_item_fails_alone_with_pointers_into_the_batch(client, example):
    bad = copy.deepcopy(example)
    bad["model"]["a"][2].pop()
    misspelt = copy.deepcopy(example)
    misspelt["weights"]["outptu"] = [1.0]
    items = [_item("good", example), _item("ragged", bad), _item("typo", misspelt), _item("number", 3)]
    r = client.post("/design/batch", json={"items": items})
    assert r.status_code == 200
    good, ragged, typo, number = r.json()["items"]
    assert good["status"] == "designed" and good["result"]["gain"]["state"]
    for answer, pointer in (
        (ragged, "/items/1/request/model/a/2"),
        (typo, "/items/2/request/weights/outptu"),
        (number, "/items/3/request"),
    ):
        assert answer["status"] == "failed" and answer["result"] is None
        problem = answer["problem"]
        assert problem["type"] == "urn:movecast:problem:invalid-request" and problem["status"] == 422
        assert pointer in [e["pointer"] for e in problem["errors"]], problem
    assert number["fingerprint"] is None


def test_an_item_with_more_bad_fields_than_a_problem_lists_counts_the_rest(client, example):
    # 60 unknown fields: the item's problem lists 50 (MAX_REPORTED_ERRORS) and counts the other 10,
    # as the same request's own problem does (it had been a 500: the item's model refused the count)
    crowded = {**example, **{f"extra_{i}": 1 for i in range(60)}}
    alone = client.post("/design", json=crowded).json()
    assert (len(alone["errors"]), alone["omitted_errors"]) == (50, 10)
    r = client.post("/design/batch", json={"items": [_item("crowded", crowded), _item("ok", example)]})
    assert r.status_code == 200, r.text
    failed, ok = r.json()["items"]
    assert failed["status"] == "failed" and ok["status"] == "designed"
    assert (len(failed["problem"]["errors"]), failed["problem"]["omitted_errors"]) == (50, 10)
    assert failed["problem"]["errors"][0]["pointer"] == "/items/0/request/extra_0"
    assert "omitted_errors" not in ok  # sent only when some were left out
    single = client.post("/design/batch", json={"items": [_item("short", {**example, "extra": 1})]}).json()
    assert "omitted_errors" not in single["items"][0]["problem"]


def test_a_numerical_failure_is_the_items_problem(client, example):
    singular = copy.deepcopy(example)
    singular["model"]["c"] = [[1.0, 0.0, 0.0, 0.0]]
    singular["weights"] = {"output": [1.0], "move": [0.0, 0.0]}
    r = client.post("/design/batch", json={"items": [_item("s", singular), _item("ok", example)]})
    failed, ok = r.json()["items"]
    assert failed["problem"]["type"] == "urn:movecast:problem:numerical-problem"
    assert "/items/0/request/weights/move" in [e["pointer"] for e in failed["problem"]["errors"]]
    assert ok["status"] == "designed"


def test_a_known_fingerprint_skips_the_design(client, example):
    first = client.post("/design", json=example).json()["fingerprint"]
    changed = copy.deepcopy(example)
    changed["weights"]["move"] = [0.2, 0.1]
    items = [
        _item("same", example, known_fingerprint=first),
        _item("changed", changed, known_fingerprint=first),
        _item("unknown", example, known_fingerprint="sha256:" + "0" * 64),
    ]
    same, moved, unknown = client.post("/design/batch", json={"items": items}).json()["items"]
    assert same == {"id": "same", "status": "unchanged", "fingerprint": first, "result": None, "problem": None}
    assert moved["status"] == "designed" and moved["fingerprint"] != first
    assert unknown["status"] == "designed" and unknown["fingerprint"] == first


@pytest.mark.parametrize(
    ("body", "pointer"),
    [
        ({"items": []}, "/items"),
        ({}, "/items"),
        ({"items": [{"request": {}}]}, "/items/0/id"),
        ({"items": [{"id": "", "request": {}}]}, "/items/0/id"),
        ({"items": [{"id": "a", "request": {}, "extra": 1}]}, "/items/0/extra"),
        ({"items": [{"id": "a", "request": {}}, {"id": "a", "request": {}}]}, "/items/1/id"),
    ],
)
def test_a_bad_envelope_fails_the_whole_batch(client, body, pointer):
    problem = assert_problem(client.post("/design/batch", json=body), 422, "invalid-request")
    assert pointer in [e["pointer"] for e in problem["errors"]], problem


def test_items_past_the_batch_time_limit_fail_with_time_limit_others_keep_results(make_client, example, rng):
    client = make_client(request_timeout_seconds=0.5)
    items = [_item("quick", example), _item("slow", slow_request(rng)), _item("late", example)]
    r = client.post("/design/batch", json={"items": items})
    assert r.status_code == 200
    quick, slow, late = r.json()["items"]
    assert quick["status"] == "designed"
    for answer in (slow, late):
        assert answer["status"] == "failed"
        assert answer["problem"]["type"] == "urn:movecast:problem:time-limit" and answer["problem"]["status"] == 503


def test_each_item_is_validated_once(client, example, monkeypatch):
    # The batch's memory estimate and the item's design read the same validated request: a
    # counting wrapper around pydantic's DesignRequest.model_validate sees each item once
    # (a bad item too: its error is kept and answered as its problem).
    from service.schemas.design import DesignRequest

    calls = []
    validate = DesignRequest.model_validate.__func__

    def counted(cls, obj, *args, **kwargs):
        calls.append(obj)
        return validate(cls, obj, *args, **kwargs)

    monkeypatch.setattr(DesignRequest, "model_validate", classmethod(counted))
    other = copy.deepcopy(example)
    other["horizons"]["prediction"] = 40
    items = [_item("a", example), _item("b", other), _item("bad", {"model": 3})]
    r = client.post("/design/batch", json={"items": items})
    assert r.status_code == 200
    assert [i["status"] for i in r.json()["items"]] == ["designed", "designed", "failed"]
    assert len(calls) == 3
