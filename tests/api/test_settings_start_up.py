"""Start-up checks of the settings as `movecast serve` reports them, one line per bad setting.

Each case is a value an operator could mistype in a plant's deployment file; `movecast serve`
must stop with exit status 2 and a line naming the variable (or the option that set it), before
any server starts, never with a traceback from deep inside the server or a silent default.
"""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from service import cli
from service.api.settings import Settings


@pytest.fixture
def serve(monkeypatch):
    """``main(["serve", ...])`` with the server replaced by a recorder (nothing listens)."""
    started: list[dict] = []

    def fake_run_server(settings, *, host, port, workers):
        started.append({"host": host, "port": port, "workers": workers})
        return 0

    monkeypatch.setattr("service.api.serving.run_server", fake_run_server)
    monkeypatch.setattr(cli, "_prepare_process_environment", lambda workers: None)  # no trouble
    for name in ("MOVECAST_HOST", "MOVECAST_PORT", "MOVECAST_WORKERS"):
        monkeypatch.delenv(name, raising=False)

    def run(*argv: str) -> list[dict]:
        assert cli.main(["serve", *argv]) in (0, 2)
        return started

    return run


def test_a_missing_key_file_names_its_variable(tmp_path):
    with pytest.raises(ValidationError) as caught:
        Settings(api_keys_file=tmp_path / "no-such-file")
    (error,) = caught.value.errors()
    assert error["loc"] == ("api_keys_file",)
    assert "cannot read the API key file" in error["msg"]


def test_serve_names_the_key_file_variable(serve, monkeypatch, tmp_path, capsys):
    monkeypatch.setenv("MOVECAST_API_KEYS_FILE", str(tmp_path / "no-such-file"))
    assert serve() == []
    assert "  MOVECAST_API_KEYS_FILE: Value error, cannot read the API key file" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("argv", "named"),
    [
        (["--port", "70000"], "--port (MOVECAST_PORT)"),
        (["--port", "0"], "--port (MOVECAST_PORT)"),
        (["--workers", "-3"], "--workers (MOVECAST_WORKERS)"),
        (["--workers", "0"], "--workers (MOVECAST_WORKERS)"),
        (["--host", ""], "--host (MOVECAST_HOST)"),
    ],
)
def test_serve_checks_its_options_as_the_settings_they_override(serve, capsys, argv, named):
    assert serve(*argv) == [], "no server may start"
    err = capsys.readouterr().err
    assert err.startswith("movecast: invalid settings, not starting:")
    assert f"  {named}: " in err


def test_serve_options_override_the_environment(serve, monkeypatch):
    monkeypatch.setenv("MOVECAST_PORT", "8100")
    monkeypatch.setenv("MOVECAST_WORKERS", "3")
    assert serve("--port", "8200", "--host", "::1") == [{"host": "::1", "port": 8200, "workers": 3}]


@pytest.mark.parametrize(
    ("argv", "named"), [(["--host", "no-such-host.invalid"], "--host (MOVECAST_HOST)"), ([], "MOVECAST_HOST")]
)
def test_a_host_name_that_does_not_resolve_is_named_before_the_server_starts(serve, monkeypatch, capsys, argv, named):
    # a well-formed name the resolver does not know had stopped inside the server with the
    # resolver's own words, naming no setting (found in an operations audit); ".invalid" is
    # reserved never to resolve (RFC 2606, section 2)
    monkeypatch.setenv("MOVECAST_HOST", "no-such-host.invalid")
    assert serve(*argv) == [], "no server may start"
    err = capsys.readouterr().err
    assert err.startswith("movecast: invalid settings, not starting:")
    assert f"  {named}: 'no-such-host.invalid' does not resolve" in err


@pytest.mark.parametrize("host", ["", "   ", "not a host", "http://0.0.0.0", "host:8000", "-bad.example", "a..b"])
def test_a_host_that_is_no_address_is_refused(monkeypatch, host):
    # an empty MOVECAST_HOST made uvicorn listen on every interface (":8000"), silently
    monkeypatch.setenv("MOVECAST_HOST", host)
    with pytest.raises(ValidationError) as caught:
        Settings()
    assert caught.value.errors()[0]["loc"] == ("host",)


@pytest.mark.parametrize("host", ["127.0.0.1", "0.0.0.0", "::", "::1", "localhost", "movecast-0.plant.example"])
def test_addresses_and_host_names_are_accepted(monkeypatch, host):
    monkeypatch.setenv("MOVECAST_HOST", host)
    assert Settings().host == host


@pytest.mark.parametrize(
    "name", ["MOVECAST_REQUEST_TIMEOUT_SECONDS", "MOVECAST_READ_TIMEOUT_SECONDS", "MOVECAST_SEND_STALL_SECONDS"]
)
@pytest.mark.parametrize("value", ["nan", "inf"])
def test_a_time_limit_must_be_a_finite_number(monkeypatch, name, value):
    monkeypatch.setenv(name, value)
    with pytest.raises(ValidationError) as caught:
        Settings()
    # "nan" had been refused as "less than or equal to 3600", which sends an operator looking
    # for a number that is too large
    assert "finite number" in caught.value.errors()[0]["msg"]


def test_a_misspelt_variable_is_named_at_start_up_with_the_setting_it_resembles(monkeypatch, caplog):
    import logging

    from fastapi.testclient import TestClient

    from service.api.app import create_app

    # pydantic-settings reads only the variables of its fields: a misspelt one was ignored in
    # silence, and the service ran on the default the operator meant to change
    monkeypatch.setenv("MOVECAST_REQUEST_TIMEOUT", "5")
    monkeypatch.setenv("MOVECAST_MAX_BODY_BYTE", "2048")
    monkeypatch.setenv("MOVECAST_NOTHING_LIKE_IT", "1")
    with caplog.at_level(logging.WARNING, logger="movecast"), TestClient(create_app(Settings())):
        pass
    messages = [r.getMessage() for r in caplog.records if r.name == "movecast.operations"]
    assert any(
        "MOVECAST_REQUEST_TIMEOUT is not a setting" in m and "MOVECAST_REQUEST_TIMEOUT_SECONDS" in m for m in messages
    )
    assert any("MOVECAST_MAX_BODY_BYTE is not a setting" in m and "MOVECAST_MAX_BODY_BYTES" in m for m in messages)
    assert any("MOVECAST_NOTHING_LIKE_IT is not a setting" in m for m in messages)
    assert not any("MOVECAST_MAX_BODY_BYTES is not" in m for m in messages)


def test_known_variables_raise_no_warning(monkeypatch, caplog):
    import logging

    from fastapi.testclient import TestClient

    from service.api.app import create_app

    monkeypatch.setenv("MOVECAST_MAX_BODY_BYTES", "2048")
    with caplog.at_level(logging.WARNING, logger="movecast"), TestClient(create_app(Settings())):
        pass
    assert not any(
        "is not a setting" in r.getMessage() and "MOVECAST_MAX_BODY" in r.getMessage() for r in caplog.records
    )


@pytest.mark.parametrize("kind", ["missing", "file"])
def test_a_metrics_folder_that_is_no_writable_folder_stops_start_up(monkeypatch, tmp_path, capsys, kind):
    # prometheus-client writes every sample there: a missing folder had ended in a traceback
    # from its mmap file on the first metric (FileNotFoundError), after start-up had gone on
    started: list[int] = []
    monkeypatch.setattr("service.api.serving.run_server", lambda *a, **k: started.append(1) or 0)
    environment = {k: v for k, v in __import__("os").environ.items() if not k.startswith("MOVECAST_")}
    monkeypatch.setattr(cli.os, "environ", environment)
    folder = tmp_path / "metrics"
    if kind == "file":
        folder.write_text("not a folder")
    environment["PROMETHEUS_MULTIPROC_DIR"] = str(folder)
    assert cli.main(["serve"]) == 2
    assert not started
    err = capsys.readouterr().err
    assert "  PROMETHEUS_MULTIPROC_DIR: " in err and "writable folder" in err
