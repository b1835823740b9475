"""The small findings: /docs without a CDN, CSV cells that cannot run, warnings as JSON log lines."""

from __future__ import annotations

import copy
import csv
import io
import json
import logging
import re
import warnings

from service.api.logs import JsonFormatter, log_warnings
from service.pipeline.csv_cells import text_cell
from service.pipeline.examples import load_example
from tests.api.conftest import KEY


def test_docs_load_their_assets_from_the_service_and_stay_open(make_client):
    client = make_client(api_keys=KEY)
    page = client.get("/docs")
    assert page.status_code == 200
    sources = re.findall(r'(?:src|href)="([^"]+)"', page.text)
    assert sources and all(s.startswith("/docs/assets/") for s in sources), sources
    assert "http://" not in page.text and "https://" not in page.text
    for source in sources:
        asset = client.get(source)
        assert asset.status_code == 200 and len(asset.content) > 500, source
    assert client.get("/redoc", follow_redirects=False).headers["location"] == "/docs"
    assert client.get("/openapi.json").status_code == 200
    assert client.get("/metrics").status_code == 401  # metrics stay behind the key


def test_text_cells_that_a_spreadsheet_could_run_are_quoted():
    # OWASP "CSV Injection": cells starting with = + - @ tab or CR are formulas to a spreadsheet.
    for dangerous in ("=HYPERLINK(1)", "+1+1", "-2+3", "@SUM(A1)", "\tx", "\rx"):
        assert text_cell(dangerous) == "'" + dangerous
    assert text_cell("TIC-101.PV") == "TIC-101.PV"


def test_the_simulation_csv_quotes_a_formula_like_tag_and_keeps_negative_numbers(make_client):
    body = copy.deepcopy(load_example("simulate_request.json"))
    body["model"]["outputs"] = [{"name": "=cmd|' /C calc'!A0"}, {"name": "@level"}]
    body["scenario"]["steps"] = 150
    body["scenario"].pop("output_disturbances", None)
    client = make_client()
    answer = client.post("/simulate", json=body, headers={"Accept": "text/csv"})
    assert answer.status_code == 200, answer.text
    rows = list(csv.reader(io.StringIO(answer.text)))
    assert rows[0][1].startswith("'=") and rows[0][2] == "'@level"
    assert not [cell for cell in rows[0] if cell[:1] in "=+-@"]
    numbers = [float(cell) for row in rows[1:] for cell in row]  # every data cell still a number
    assert any(n < 0 for n in numbers)


def test_warnings_reach_the_log_as_json_lines_without_source_paths(caplog):
    previous = warnings.showwarning
    try:
        log_warnings()
        with caplog.at_level("WARNING", logger="movecast.warnings"), warnings.catch_warnings():
            warnings.simplefilter("always")
            warnings.showwarning = __import__("service.api.logs", fromlist=["_show_warning"])._show_warning
            warnings.warn("overflow encountered in multiply", RuntimeWarning, stacklevel=1)
        (record,) = [r for r in caplog.records if r.name == "movecast.warnings"]
        line = JsonFormatter().format(record)
        entry = json.loads(line)
        assert entry["message"] == "RuntimeWarning: overflow encountered in multiply"
        assert ".py" not in line and entry["level"] == "warning"
    finally:
        warnings.showwarning = previous
        logging.getLogger("movecast.warnings").handlers.clear()


def test_an_object_of_the_wrong_type_is_named_as_a_json_object_not_a_python_class(make_client):
    # Found in an audit of hostile input: pydantic's sentence for a block of the wrong type named
    # the schema's Python class ("input should be a valid dictionary or instance of Horizons").
    client = make_client()
    cases = [
        ("/design", lambda b: b.__setitem__("horizons", None), "/horizons"),
        ("/design", lambda b: b.__setitem__("model", "state_space"), "/model"),
        ("/design", lambda b: b["weights"].__setitem__("output", {"z1": 1}), "/weights/output"),
        ("/design/batch", lambda b: b["items"].__setitem__(0, [1]), "/items/0"),
    ]
    examples = {"/design": "design_request.json", "/design/batch": "batch_request.json"}
    for route, edit, where in cases:
        body = copy.deepcopy(load_example(examples[route]))
        edit(body)
        answer = client.post(route, json=body)
        assert answer.status_code == 422, answer.text
        details = {e["pointer"]: e["detail"] for e in answer.json()["errors"]}
        assert where in details, details
        assert "instance of" not in answer.text and "dictionary" not in answer.text, details
    answer = client.post("/design", json=[1, 2])
    assert answer.json()["errors"] == [
        {"pointer": "", "detail": "input should be a JSON object (a set of named fields)"}
    ]


def test_a_compressed_body_is_a_415_that_says_so(make_client):
    # Found in an audit of hostile input: a gzip body was answered "not valid UTF-8 (byte 1)", and
    # a body labelled 'Content-Encoding: br' but sent plain was read as if the label were absent.
    # RFC 9110, section 15.5.16: an unsupported content coding is a 415, with Accept-Encoding
    # naming the codings accepted.
    import gzip

    client = make_client()
    body = json.dumps(load_example("design_request.json")).encode()
    csv_body = b"minutes,steam_valve,vessel_temperature\n0,1,2\n"
    for route, content, kind in [
        ("/design", gzip.compress(body), "application/json"),
        ("/design", body, "application/json"),
        ("/identify?sample_time=1&inputs=steam_valve&outputs=vessel_temperature", gzip.compress(csv_body), "text/csv"),
    ]:
        for coding in ("gzip", "br", "GZIP, identity"):
            answer = client.post(route, content=content, headers={"content-type": kind, "content-encoding": coding})
            assert answer.status_code == 415, answer.text
            assert answer.headers["accept-encoding"] == "identity"
            assert "Content-Encoding" in answer.json()["detail"]
    plain = client.post(
        "/design", content=body, headers={"content-type": "application/json", "content-encoding": "identity"}
    )
    assert plain.status_code == 200, plain.text
