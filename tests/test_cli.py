"""The movecast command line."""

from __future__ import annotations

import io
import json

import pytest

from service.cli import build_parser, main


def test_design_without_a_file_designs_the_example(capsys, client, example):
    assert main(["design"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == client.post("/design", json=example).json()


def test_design_reads_a_file_and_stdin(tmp_path, capsys, monkeypatch, example):
    path = tmp_path / "request.json"
    example["horizons"]["prediction"] = 12
    path.write_text(json.dumps(example))
    assert main(["design", str(path)]) == 0
    from_file = json.loads(capsys.readouterr().out)
    monkeypatch.setattr("sys.stdin", io.StringIO(json.dumps(example)))
    assert main(["design", "-"]) == 0
    assert json.loads(capsys.readouterr().out) == from_file
    assert len(from_file["gain"]["horizon"][0]) == 12 * 2


@pytest.mark.parametrize(
    ("content", "pointer"),
    [("{not json", None), ('{"model": 1}', "/model")],
)
def test_design_reports_bad_input_as_problem_details(tmp_path, capsys, content, pointer):
    path = tmp_path / "bad.json"
    path.write_text(content)
    assert main(["design", str(path)]) == 2
    problem = json.loads(capsys.readouterr().err)
    assert problem["type"].startswith("urn:movecast:problem:")
    if pointer:
        assert pointer in [e["pointer"] for e in problem["errors"]]


def test_design_reports_a_missing_file(capsys):
    assert main(["design", "no-such-file.json"]) == 2
    assert "Cannot read" in json.loads(capsys.readouterr().err)["detail"]


def test_serve_takes_host_port_and_workers():
    args = build_parser().parse_args(["serve", "--host", "0.0.0.0", "--port", "9000", "--workers", "2"])
    assert (args.host, args.port, args.workers) == ("0.0.0.0", 9000, 2)


def test_openapi_prints_the_served_schema(capsys, client):
    assert main(["openapi"]) == 0
    assert json.loads(capsys.readouterr().out) == client.get("/openapi.json").json()


def test_only_the_request_s_own_validation_is_reported_against_the_request(capsys):
    # A request that fails its model is a 422-style problem (exit 2); an answer that fails its
    # response model is the service's own fault (the service answers it 500), not the request's.
    from pydantic import BaseModel, ValidationError

    from service.cli import EXIT_INVALID, _run_offline

    class Strict(BaseModel):
        value: int

    def answer(request):
        return Strict.model_validate({"value": "not a number"})

    assert (
        _run_offline(None, "design_request.json", lambda body: Strict.model_validate({"value": []}), answer)
        == EXIT_INVALID
    )
    assert '"pointer": "/value"' in capsys.readouterr().err
    with pytest.raises(ValidationError):
        _run_offline(None, "design_request.json", lambda body: Strict(value=1), answer)
