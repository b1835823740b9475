"""GET /metrics: Prometheus text, labelled by route template, with sizes, solver time, rejections."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families

from tests.api.conftest import KEY

ROOT = Path(__file__).resolve().parents[2]


def samples(client, **headers) -> dict[tuple[str, frozenset], float]:
    """Every sample of GET /metrics, parsed with prometheus-client's own parser."""
    r = client.get("/metrics", headers=headers)
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/plain")
    found = {}
    for family in text_string_to_metric_families(r.text):
        for s in family.samples:
            found[(s.name, frozenset(s.labels.items()))] = s.value
    return found


def value(found, name, **labels) -> float:
    return found.get((name, frozenset(labels.items())), 0.0)


def test_requests_are_counted_by_route_template_method_and_status(make_client, example):
    client = make_client()
    before = samples(client)
    client.post("/design", json=example)
    client.post("/design", json={"model": {}})
    client.get("/design/42/secret-looking-path")
    after = samples(client)
    ok = {"method": "POST", "route": "/design", "status": "200"}
    bad = {"method": "POST", "route": "/design", "status": "422"}
    assert value(after, "movecast_requests_total", **ok) - value(before, "movecast_requests_total", **ok) == 1
    assert value(after, "movecast_requests_total", **bad) - value(before, "movecast_requests_total", **bad) == 1
    count = "movecast_request_duration_seconds_count"
    assert value(after, count, **ok) - value(before, count, **ok) == 1
    assert value(after, "movecast_request_duration_seconds_bucket", **ok, le="+Inf") >= 1
    # Raw paths never become labels: an unknown path is "<unmatched>".
    assert value(after, "movecast_requests_total", method="GET", route="<unmatched>", status="404") >= 1
    assert not [key for key in after if "secret-looking-path" in str(key)]
    # Every request answered: none left in progress.
    assert value(after, "movecast_requests_in_progress", route="/design") == 0


def test_design_sizes_and_solver_time(make_client, example):
    client = make_client()
    before = samples(client)
    client.post("/design", json=example)
    after = samples(client)

    def grew(name, **labels):
        return value(after, name, **labels) - value(before, name, **labels)

    # The example plant: n = 4 states, m = 2 inputs, p = 2 outputs, Hu*m = 5*2 = 10.
    for dimension, size in (("states", 4), ("inputs", 2), ("outputs", 2), ("hessian", 10)):
        assert grew("movecast_design_size_count", dimension=dimension) == 1
        assert grew("movecast_design_size_sum", dimension=dimension) == size
    assert grew("movecast_solver_duration_seconds_count", operation="design") == 1


def test_rejections_are_counted_by_reason(make_client, example):
    client = make_client(api_keys=KEY, max_body_bytes=1024)
    auth = {"Authorization": f"Bearer {KEY}"}
    before = samples(client, **auth)
    client.post("/design", json=example)  # no key
    client.post("/design", json={"model": {}}, headers=auth)  # validation
    client.post("/design", content=b"[" * 2000, headers={**auth, "content-type": "application/json"})  # too large
    singular = json.loads(json.dumps(example))
    singular["model"]["c"] = [[1.0, 0.0, 0.0, 0.0]]
    singular["weights"] = {"output": [1.0], "move": [0.0, 0.0]}
    client.post("/design", json=singular, headers=auth)  # numerical
    after = samples(client, **auth)
    for reason in ("unauthorized", "validation", "too_large", "numerical"):
        name = "movecast_rejected_requests_total"
        assert value(after, name, reason=reason) - value(before, name, reason=reason) == 1, reason


def test_multiprocess_mode_adds_up_the_samples_of_every_process(tmp_path):
    # prometheus-client's multiprocess mode: each process writes to PROMETHEUS_MULTIPROC_DIR,
    # /metrics in any process reads them all. Two processes post; a third one reads.
    post = textwrap.dedent(
        """
        from fastapi.testclient import TestClient
        from service.api import Settings, create_app
        client = TestClient(create_app(Settings()))
        for _ in range(3):
            assert client.get("/healthz").status_code == 200
        """
    )
    read = textwrap.dedent(
        """
        from fastapi.testclient import TestClient
        from service.api import Settings, create_app
        print(TestClient(create_app(Settings())).get("/metrics").text)
        """
    )
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(tmp_path), "PYTHONPATH": str(ROOT)}
    for _ in range(2):
        subprocess.run([sys.executable, "-c", post], env=env, cwd=ROOT, check=True, timeout=120)
    assert list(tmp_path.glob("*.db"))
    text = subprocess.run(
        [sys.executable, "-c", read], env=env, cwd=ROOT, check=True, timeout=120, capture_output=True, text=True
    ).stdout
    found = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            found[(s.name, frozenset(s.labels.items()))] = s.value
    assert value(found, "movecast_requests_total", method="GET", route="/healthz", status="200") == 6


def test_made_up_methods_and_paths_add_no_series(make_client):
    """Every label comes from a fixed set: 180 made-up methods and paths (401s and 404s, the
    unauthenticated case of the report) add at most the few ``other``/``<unmatched>`` series."""
    client = make_client(api_keys=KEY)
    auth = {"Authorization": f"Bearer {KEY}"}
    samples(client, **auth)
    for i in range(5):  # warm-up: every series these requests can ever create
        client.request(f"M{i:06d}X", "/healthz")
        client.request(f"M{i:06d}X", f"/no/such/{i}", headers=auth)
        client.get(f"/junk-{i}")
    before = samples(client, **auth)
    size_before = len(client.get("/metrics", headers=auth).content)
    for i in range(60):
        client.request(f"Z{i:06d}Q", "/healthz")
        client.request(f"W{i:06d}", f"/path/{i}/x", headers=auth)
        client.get(f"/other-{i}?q={i}")
    after = samples(client, **auth)
    size_after = len(client.get("/metrics", headers=auth).content)
    new = {key for key in set(after) - set(before) if not key[0].endswith(("_bucket", "_created"))}
    assert not new, sorted(new)
    assert size_after - size_before < 2_000
    methods = {dict(labels).get("method") for name, labels in after if name == "movecast_requests_total"}
    assert methods <= {"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS", "other"}, methods
    routes = {dict(labels).get("route") for name, labels in after if name == "movecast_requests_total"}
    assert not [r for r in routes if "/path/" in r or "other-" in r or "no/such" in r or "junk" in r], routes
    assert value(after, "movecast_requests_total", method="other", route="/healthz", status="405") >= 60


def _context_middleware(client):
    """The app's RequestContextMiddleware instance (the stack is built on the first request)."""
    from service.api.middleware import RequestContextMiddleware

    layer = client.app.middleware_stack
    while layer is not None and not isinstance(layer, RequestContextMiddleware):
        layer = getattr(layer, "app", None)
    assert layer is not None
    return layer


def test_route_templates_are_remembered_per_request_line_within_a_bound(make_client, monkeypatch):
    import service.api.middleware as middleware

    monkeypatch.setattr(middleware, "TEMPLATE_MEMO_SIZE", 8)
    client = make_client()
    before = samples(client)
    # A path with a parameter counts under its template, first time and remembered alike.
    for _ in range(2):
        client.get("/workbench/examples/no-such-example")
    # Made-up paths: each "<unmatched>", and the memo never holds more than its bound.
    for k in range(20):
        client.get(f"/made-up/{k}")
    after = samples(client)
    memo = _context_middleware(client)._templates
    assert 0 < len(memo) <= 8
    template = "/workbench/examples/{name}"
    counted = sum(
        v - before.get(key, 0.0)
        for key, v in after.items()
        if key[0] == "movecast_requests_total" and dict(key[1]).get("route") == template
    )
    assert counted == 2
    unmatched = sum(
        v - before.get(key, 0.0)
        for key, v in after.items()
        if key[0] == "movecast_requests_total" and dict(key[1]).get("route") == "<unmatched>"
    )
    assert unmatched >= 20
    # The memo's answer is the full scan's, for a path it holds.
    for (method, path, root), template in memo.items():
        scope = {"type": "http", "method": method, "path": path, "root_path": root, "app": client.app, "headers": []}
        assert middleware.route_template(scope) == template
