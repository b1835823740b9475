"""The ``movecast`` command line: serve, design, simulate, openapi.

    movecast serve [--host H] [--port P] [--workers N]   run the HTTP service (uvicorn)
    movecast design [FILE | -]                           print a design as JSON, no server
    movecast simulate [FILE | -] [--csv]                 print a simulated run as JSON (or CSV)
    movecast identify FILE.csv --inputs A,B --outputs Y,Z --sample-time TS [...]
                                                         fit a model to plant-test data, print JSON
    movecast openapi [--output FILE]                     print or write the OpenAPI document

``movecast design`` with no FILE designs the bundled example plant; ``movecast simulate``
with no FILE simulates the bundled example scenario.  A request that fails
its checks prints the same problem details the service would answer, on standard error,
and exits with status 2.
"""

from __future__ import annotations

import argparse
import atexit
import json
import os
import shutil
import sys
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ValidationError

from service.errors import MalformedBody, MovecastError

__all__ = ["main"]

EXIT_INVALID = 2


def _read_request(source: str | None, example: str) -> Any:
    if source is None:
        from service.pipeline.examples import load_example

        return load_example(example)
    text = sys.stdin.read() if source == "-" else Path(source).read_text(encoding="utf-8")
    return json.loads(text)


def _run_offline(
    source: str | None,
    example: str,
    parse: Callable[[Any], BaseModel],
    answer: Callable[[Any], BaseModel],
    render: Callable[[Any], str] | None = None,
    *,
    read: Callable[[str | None], Any] | None = None,
) -> int:
    """Parse, check and answer one request without a server; print JSON (or ``render(response)``).

    A failure prints the problem the service would answer at the endpoint named by ``example``.
    """
    from service.pipeline.problems import problem_of

    instance = "/" + example.removesuffix("_request.json")
    try:
        try:
            request = parse(read(source) if read is not None else _read_request(source, example))
        except json.JSONDecodeError as exc:
            raise MalformedBody(f"The request is not valid JSON: {exc}") from exc
        except OSError as exc:
            raise MalformedBody(f"Cannot read the request: {exc.strerror or exc}") from exc
    except (ValidationError, MovecastError) as exc:
        print(json.dumps(problem_of(exc).body(instance), indent=2), file=sys.stderr)
        return EXIT_INVALID
    try:
        response = answer(request)
    except MovecastError as exc:
        # as the service answers it; any other error (an answer its own model refuses among
        # them) is the service's fault, as a 500 is, and is not reported against the request
        print(json.dumps(problem_of(exc).body(instance), indent=2), file=sys.stderr)
        return EXIT_INVALID
    if render is None:
        print(response.model_dump_json(indent=2))
    else:
        sys.stdout.write(render(response))
    return 0


def _design(args: argparse.Namespace) -> int:
    from service.api.settings import Settings
    from service.pipeline.design import run_design
    from service.schemas.design import DesignRequest

    caps = Settings().caps()
    return _run_offline(args.file, "design_request.json", DesignRequest.model_validate, lambda r: run_design(r, caps))


def _simulate(args: argparse.Namespace) -> int:
    from service.api.settings import Settings
    from service.pipeline.simulate import run_simulation, simulation_csv
    from service.schemas.simulate import SimulateRequest

    caps = Settings().caps()
    return _run_offline(
        args.file,
        "simulate_request.json",
        SimulateRequest.model_validate,
        lambda r: run_simulation(r, caps),
        simulation_csv if args.csv else None,
    )


#: Options of ``movecast identify`` that are query parameters of POST /identify/csv.
IDENTIFY_OPTIONS = (
    "sample_time",
    "inputs",
    "outputs",
    "disturbances",
    "integrating",
    "pairs",
    "time_column",
    "time_unit",
    "structure",
    "order",
    "block_rows",
    "max_dead_time",
    "settling_time",
    "outlier_limit",
    "validation_fraction",
    "correlation_lags",
)


def _identify(args: argparse.Namespace) -> int:
    from service.api.settings import Settings
    from service.pipeline.identify import run_identify
    from service.pipeline.identify_csv import identify_request_from_csv
    from service.schemas.identify_csv import IdentifyCsvOptions

    caps = Settings().caps()
    chosen = {name: getattr(args, name) for name in IDENTIFY_OPTIONS if getattr(args, name) is not None}
    if args.detrend:
        chosen["detrend"] = True

    def read(_: object) -> bytes:
        return sys.stdin.buffer.read() if args.file == "-" else Path(args.file).read_bytes()

    def parse(body: Any) -> BaseModel:
        return identify_request_from_csv(body, IdentifyCsvOptions.model_validate(chosen))

    return _run_offline(args.file, "", parse, lambda r: run_identify(r, caps), read=read)


def _positive_env(name: str, default: int) -> int:
    try:
        return max(1, int(os.environ.get(name, default)))
    except ValueError:
        return default  # the settings check reports it


def _prepare_process_environment(workers: int) -> str | None:
    """Set what numpy and prometheus-client read once, at import: before importing them.

    BLAS/OpenMP threads: one, unless the variables are already set.  The service scales by
    solver processes, workers and replicas; a BLAS pool of several threads only adds
    contention on a busy host (the large benchmark design over HTTP: 0.19 s with one thread
    against 0.9-3 s with two on 2 loaded cores, measured side by side).  The heavy lane's
    solvers take the operator's value (``service.api.compute``); the light lane always runs
    one thread.
    With several workers, a fresh prometheus-client multiprocess folder (or the given one,
    emptied of old samples) so that /metrics adds up every worker.

    Returns a line for the operator when the given folder is no writable folder (nothing set then).
    """
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if folder and not (Path(folder).is_dir() and os.access(folder, os.W_OK | os.X_OK)):
        # prometheus-client writes every sample there: it would fail on the first metric
        return "  PROMETHEUS_MULTIPROC_DIR: not a writable folder; create it (empty) or unset the variable"
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, "1")
    if folder:
        for old in Path(folder).glob("*.db"):
            old.unlink()
    elif workers > 1:
        made = tempfile.mkdtemp(prefix="movecast-metrics-")
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = made
        atexit.register(shutil.rmtree, made, True)
    return None


#: Options of ``movecast serve`` that override a setting, checked as that setting.
SERVE_OPTIONS = ("host", "port", "workers")


def _settings_or_message(overrides: dict[str, Any] | None = None) -> Any:
    """The settings, or None after printing each bad one by its variable (never its value).

    ``overrides`` (the options of ``movecast serve``) take the place of their variables and are
    checked by the same rules; a bad one is named by its option and its variable.
    """
    from service.api.settings import Settings

    given = overrides or {}
    try:
        return Settings(**given)
    except ValidationError as exc:
        print("movecast: invalid settings, not starting:", file=sys.stderr)
        for error in exc.errors():
            field = "_".join(str(p) for p in error["loc"][:1])
            name = "MOVECAST_" + field.upper()
            if field in given:
                name = f"--{field.replace('_', '-')} ({name})"
            print(f"  {name}: {error['msg']}", file=sys.stderr)
        return None


def _unresolved_host(host: str, *, from_option: bool) -> str | None:
    """A line for the operator when ``host`` names no address of this machine's resolver, else None.

    A host name that passes the settings' check but does not resolve had stopped inside the
    server with the resolver's own words ("Name or service not known"), naming no setting.
    """
    import socket

    try:
        socket.getaddrinfo(host, None, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except (OSError, UnicodeError) as exc:
        name = "--host (MOVECAST_HOST)" if from_option else "MOVECAST_HOST"
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        return f"  {name}: {host!r} does not resolve to an address to listen on ({reason}); give an IP address"
    return None


def _serve(args: argparse.Namespace) -> int:
    overrides = {name: getattr(args, name) for name in SERVE_OPTIONS if getattr(args, name) is not None}
    trouble = _prepare_process_environment(overrides.get("workers") or _positive_env("MOVECAST_WORKERS", 1))
    if trouble is not None:
        print("movecast: invalid settings, not starting:", file=sys.stderr)
        print(trouble, file=sys.stderr)
        return EXIT_INVALID
    settings = _settings_or_message(overrides)
    if settings is None:
        return EXIT_INVALID
    unresolved = _unresolved_host(settings.host, from_option="host" in overrides)
    if unresolved is not None:
        print("movecast: invalid settings, not starting:", file=sys.stderr)
        print(unresolved, file=sys.stderr)
        return EXIT_INVALID
    from service.api.serving import run_server

    return run_server(settings, host=settings.host, port=settings.port, workers=settings.workers)


def _openapi(args: argparse.Namespace) -> int:
    from service.api.app import create_app

    text = json.dumps(create_app().openapi(), indent=2, sort_keys=True) + "\n"
    if args.output:
        Path(args.output).write_text(text, encoding="utf-8")
    else:
        sys.stdout.write(text)
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (public so the tests can inspect it)."""
    parser = argparse.ArgumentParser(prog="movecast", description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)

    serve = commands.add_parser("serve", help="run the HTTP service")
    serve.add_argument("--host", help="address to listen on (default MOVECAST_HOST or 127.0.0.1)")
    serve.add_argument("--port", type=int, help="TCP port (default MOVECAST_PORT or 8000)")
    serve.add_argument("--workers", type=int, help="worker processes (default MOVECAST_WORKERS or 1)")
    serve.set_defaults(run=_serve)

    design = commands.add_parser("design", help="print a design as JSON without a server")
    design.add_argument("file", nargs="?", help="request JSON file, '-' for standard input; default: the example plant")
    design.set_defaults(run=_design)

    simulate = commands.add_parser("simulate", help="print a simulated closed-loop run as JSON without a server")
    simulate.add_argument(
        "file", nargs="?", help="request JSON file, '-' for standard input; default: the example plant and scenario"
    )
    simulate.add_argument("--csv", action="store_true", help="print the time series as CSV instead")
    simulate.set_defaults(run=_simulate)

    identify = commands.add_parser("identify", help="fit a model to plant-test data (CSV) without a server")
    identify.add_argument("file", help="CSV file with a header row of tags, '-' for standard input")
    identify.add_argument("--inputs", required=True, help="manipulated inputs, comma-separated")
    identify.add_argument("--outputs", required=True, help="controlled outputs, comma-separated")
    identify.add_argument("--sample-time", dest="sample_time", type=float, required=True, help="sample time")
    identify.add_argument("--disturbances", help="measured disturbances, comma-separated")
    identify.add_argument("--integrating", help="outputs that integrate, comma-separated")
    identify.add_argument("--pairs", help="single pairs as output:input:structure, comma-separated")
    identify.add_argument("--time-column", dest="time_column", help="column of the time stamps")
    identify.add_argument("--time-unit", dest="time_unit", choices=("s", "min", "h"), help="unit of date-times")
    identify.add_argument("--structure", choices=("first_order_dead_time", "second_order_dead_time", "subspace"))
    identify.add_argument("--order", type=int, help="subspace fit: the model order")
    identify.add_argument("--block-rows", dest="block_rows", type=int, help="subspace fit: block rows")
    identify.add_argument("--detrend", action="store_true", help="fit a linear drift per output")
    identify.add_argument("--max-dead-time", dest="max_dead_time", type=float)
    identify.add_argument("--settling-time", dest="settling_time", type=float)
    identify.add_argument(
        "--outlier-limit", dest="outlier_limit", help="robust standard deviations, or 'none' for no outlier check"
    )
    identify.add_argument("--validation-fraction", dest="validation_fraction", type=float)
    identify.add_argument("--correlation-lags", dest="correlation_lags", type=int)
    identify.set_defaults(run=_identify)

    openapi = commands.add_parser("openapi", help="print or write the OpenAPI document")
    openapi.add_argument("--output", help="write to this file instead of standard output")
    openapi.set_defaults(run=_openapi)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``movecast`` console script."""
    args = build_parser().parse_args(argv)
    result: int = args.run(args)
    return result


if __name__ == "__main__":
    sys.exit(main())
