"""GET / and /workbench/...: the workbench's files, served openly; the API stays protected."""

from __future__ import annotations

import re
import tomllib
from importlib import metadata, resources
from pathlib import Path

import pytest

from service.api.routes.workbench import ASSETS
from service.api.security import is_open_path, route_path
from service.pipeline.examples import list_examples, load_example
from tests.api.conftest import KEY

ROOT = Path(__file__).resolve().parents[2]


def test_the_page_and_its_files_are_served_without_a_key_while_the_api_needs_one(make_client, example):
    client = make_client(api_keys=KEY)
    page = client.get("/")
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    assert '<meta name="movecast-auth" content="required">' in page.text
    assert "Design aid only" in page.text and "{{" not in page.text
    for name, media in ASSETS.items():
        r = client.get(f"/workbench/{name}")
        assert r.status_code == 200 and r.headers["content-type"] == media, name
    assert client.get("/workbench/examples").status_code == 200
    assert client.post("/design", json=example).status_code == 401
    assert client.post("/design", json=example, headers={"Authorization": f"Bearer {KEY}"}).status_code == 200
    assert client.get("/metrics").status_code == 401


def test_without_keys_the_page_does_not_ask_for_one(make_client):
    assert '<meta name="movecast-auth" content="none">' in make_client().get("/").text


def test_every_url_in_the_page_is_relative(make_client):
    text = make_client().get("/").text
    for url in re.findall(r'(?:src|href)="([^"]+)"', text):
        assert not url.startswith(("/", "http:", "https:")) or url.startswith("#"), url
    for name in ASSETS:
        script = (ROOT / "service" / "web" / name).read_text(encoding="utf-8")
        assert not re.search(r"""fetch\(\s*["'`]/""", script), name
        assert "http://" not in script and "https://" not in script, name


def test_plotly_comes_from_the_installed_pinned_package(make_client):
    client = make_client()
    shipped = resources.files("plotly").joinpath("package_data", "plotly.min.js").read_bytes()
    plain = client.get("/workbench/vendor/plotly.min.js", headers={"Accept-Encoding": "identity"})
    assert plain.status_code == 200 and "content-encoding" not in plain.headers
    assert plain.content == shipped
    packed = client.get("/workbench/vendor/plotly.min.js", headers={"Accept-Encoding": "gzip"})
    assert packed.headers["content-encoding"] == "gzip" and packed.content == shipped  # httpx decodes it
    pinned = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]["dependencies"]
    pin = next(d for d in pinned if d.startswith("plotly"))
    assert pin == f"plotly=={metadata.version('plotly')}"


def test_the_bundled_examples_are_listed_with_their_endpoints(make_client):
    client = make_client()
    listed = {e["name"]: e["endpoint"] for e in client.get("/workbench/examples").json()}
    assert listed["design_request.json"] == "design"
    assert listed["simulate_request.json"] == "simulate"
    assert listed["sweep_request.json"] == "design/sweep"
    assert set(listed) <= set(list_examples())
    assert client.get("/workbench/examples/design_request.json").json() == load_example("design_request.json")
    assert client.get("/workbench/examples/nope.json").status_code == 404


@pytest.mark.parametrize(
    "path", ["/workbench/nope.js", "/workbench/index.html", "/workbench/__init__.py", "/workbench/..%2Fapp.py"]
)
def test_only_the_named_files_are_served(make_client, path):
    assert make_client().get(path).status_code == 404


def test_the_workbench_is_left_out_of_the_api_document(make_client):
    paths = make_client().get("/openapi.json").json()["paths"]
    assert "/" not in paths and not any(p.startswith("/workbench") for p in paths)


def test_open_paths_are_judged_without_the_proxy_prefix():
    # the ASGI root_path rule (the ASGI HTTP connection scope: path includes root_path)
    assert route_path({"path": "/mc/healthz", "root_path": "/mc"}) == "/healthz"
    assert route_path({"path": "/mc", "root_path": "/mc"}) == "/"
    assert route_path({"path": "/mcx/design", "root_path": "/mc"}) == "/mcx/design"
    assert route_path({"path": "/design", "root_path": "/mc"}) == "/design"
    assert is_open_path("/") and is_open_path("/workbench/workbench.js")
    assert not is_open_path("/design") and not is_open_path("/workbench/../design")
    assert not is_open_path("/metrics")
