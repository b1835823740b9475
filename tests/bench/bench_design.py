"""Benchmark of the unconstrained design: solver against a textbook version and the BLAS floor.

Run from the repository root::

    python tests/bench/bench_design.py [--cases small,medium,large] [--seconds 5] [--skip-http]

Part one times, on random stable plants with a fixed seed,

- ``design_controller`` (the whole design: prediction matrices, Hessian, Cholesky factor,
  its eigenvalues, first-move gains, closed-loop poles, warnings);
- the gain part alone (``prediction_matrices`` + ``weighted_moves`` + ``toeplitz_hessian`` +
  ``factor_hessian`` + ``first_move_gain``);
- a textbook direct implementation written here: ``G`` from explicit matrix powers, dense
  ``kron(I, Q)`` and ``kron(I, R)`` weights and ``numpy.linalg.inv`` of ``H``;
- the BLAS floor: ``G' G`` with numpy plus ``scipy.linalg.cho_factor`` of a matrix of that size.

Each time is the best of N runs of ``time.perf_counter`` (N chosen per case from a time
budget).  The textbook and solver gains are compared so that the comparison is honest.
Target: the large case within 2x of the floor and at least 10x faster than the textbook.

Part two starts ``movecast serve`` on a free loopback port and measures requests per second
and latency percentiles of ``POST /design`` (small case) and ``GET /healthz`` from a few
client threads for a fixed time each.

This is a script, not a test: it prints figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import io
import os
import platform
import pstats
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy
import scipy.linalg
from numpy.typing import NDArray

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from service.solver.design.controller import design_controller  # noqa: E402
from service.solver.design.gain import (  # noqa: E402
    PredictiveGain,
    factor_hessian,
    first_move_gain,
    toeplitz_hessian,
    weighted_moves,
)
from service.solver.design.prediction import prediction_matrices  # noqa: E402
from service.solver.design.weights import weight_matrix, weight_root  # noqa: E402

__all__ = ["main"]

SEED = 20261201
OUTPUT_WEIGHT = 1.0
MOVE_WEIGHT = 0.1
#: Targets of the issue for the large case.
FLOOR_RATIO_TARGET = 2.0
TEXTBOOK_SPEEDUP_TARGET = 10.0

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Case:
    """One benchmark size: n states, m inputs, p outputs, horizons Hp and Hu."""

    name: str
    states: int
    inputs: int
    outputs: int
    prediction: int
    control: int


CASES = {
    "small": Case("small", 10, 3, 3, 40, 8),
    "medium": Case("medium", 50, 10, 10, 100, 20),
    "large": Case("large", 200, 20, 20, 200, 50),
}


@dataclass(frozen=True)
class Plant:
    """A random stable plant with diagonal tuning, for one case."""

    case: Case
    a: Array
    b: Array
    c: Array
    output_weight: Array  # diagonal, shape (p,)
    move_weight: Array  # diagonal, shape (m,)


def random_plant(case: Case, rng: np.random.Generator) -> Plant:
    """Random A scaled to spectral radius 0.95, Gaussian B and C, unit Q and R = 0.1 I."""
    a = rng.normal(size=(case.states, case.states))
    a *= 0.95 / max(abs(np.linalg.eigvals(a)))
    b = rng.normal(size=(case.states, case.inputs))
    c = rng.normal(size=(case.outputs, case.states))
    return Plant(
        case=case,
        a=a,
        b=b,
        c=c,
        output_weight=np.full(case.outputs, OUTPUT_WEIGHT),
        move_weight=np.full(case.inputs, MOVE_WEIGHT),
    )


# --------------------------------------------------------------------------- the contenders


def movecast_design(plant: Plant) -> PredictiveGain:
    """The whole design, as the service runs it."""
    case = plant.case
    design = design_controller(
        plant.a,
        plant.b,
        plant.c,
        output_weight=plant.output_weight,
        move_weight=plant.move_weight,
        prediction=case.prediction,
        control=case.control,
    )
    return design.gain


def movecast_gain(plant: Plant) -> PredictiveGain:
    """The gain part of the solver alone (no closed loop, no warnings)."""
    case = plant.case
    q = weight_matrix(plant.output_weight, case.outputs)
    r = weight_matrix(plant.move_weight, case.inputs)
    pred = prediction_matrices(plant.a, plant.b, plant.c, prediction=case.prediction, control=case.control)
    root = weight_root(q)
    weighted = weighted_moves(pred, root)
    hessian = factor_hessian(
        toeplitz_hessian(pred, weighted, root, r),
        weighted=weighted,
        move_weight=r,
        control=case.control,
    )
    return first_move_gain(pred, hessian, weighted, root)


def textbook_gain(plant: Plant) -> PredictiveGain:
    """The direct textbook route: matrix powers, dense Kronecker weights, explicit inverse.

    ``G`` holds blocks ``S_(i-j)`` with ``S_i = sum_(l<i) C A^l B``; each ``C A^l B`` and each
    ``C A^i`` of ``Fx`` comes from ``numpy.linalg.matrix_power``.  Then
    ``H = G' Qbar G + Rbar`` and ``K = inv(H) G' Qbar`` with ``Qbar = kron(I, Q)`` and
    ``Rbar = kron(I, R)``; the applied gain is the first m rows of ``K``.
    """
    case = plant.case
    a, b, c = plant.a, plant.b, plant.c
    hp, hu, p, m = case.prediction, case.control, case.outputs, case.inputs
    q = np.diag(plant.output_weight)
    r = np.diag(plant.move_weight)
    markov = [c @ np.linalg.matrix_power(a, lag) @ b for lag in range(hp)]
    step = [np.zeros((p, m))]
    for lag in range(hp):
        step.append(step[-1] + markov[lag])
    g = np.zeros((hp * p, hu * m))
    for i in range(1, hp + 1):
        for j in range(min(i, hu)):
            g[(i - 1) * p : i * p, j * m : (j + 1) * m] = step[i - j]
    fx = np.vstack([c @ np.linalg.matrix_power(a, i) for i in range(1, hp + 1)])
    fu = np.vstack(step[1:])
    q_bar = np.kron(np.eye(hp), q)
    r_bar = np.kron(np.eye(hu), r)
    h = g.T @ q_bar @ g + r_bar
    k = np.linalg.inv(h) @ g.T @ q_bar
    kh = k[:m]
    kr = kh @ np.kron(np.ones((hp, 1)), np.eye(p))
    return PredictiveGain(horizon=kh, state=kh @ fx, previous_input=kh @ fu, setpoint=kr)


def floor_inputs(plant: Plant) -> tuple[Array, Array]:
    """``G`` of shape (Hp*p, Hu*m) for the plant and the diagonal of the move weights."""
    case = plant.case
    pred = prediction_matrices(plant.a, plant.b, plant.c, prediction=case.prediction, control=case.control)
    return np.ascontiguousarray(pred.moves), np.tile(plant.move_weight, case.control)


def blas_floor(g: Array, diagonal: Array) -> None:
    """The least any design must do: ``G' G`` and one Cholesky factorization of that size."""
    h = g.T @ g
    h[np.diag_indices_from(h)] += diagonal
    scipy.linalg.cho_factor(h, lower=True, check_finite=False)


# --------------------------------------------------------------------------- timing


def best_of(runs: dict[str, Callable[[], object]], *, budget: float, most: int = 500) -> dict[str, tuple[float, int]]:
    """Best wall time (``time.perf_counter``) of each callable over N interleaved rounds.

    After one warm-up call of each, every round calls each callable once, so load from
    other processes falls on all of them alike.  Rounds go on until ``budget`` seconds are
    spent, at least 3 and at most ``most``, so N adapts to the case size.  Returns
    ``{name: (best time in seconds, N)}``.
    """
    for run in runs.values():
        run()
    best = {name: float("inf") for name in runs}
    rounds = 0
    spent = 0.0
    while rounds < 3 or (spent < budget and rounds < most):
        for name, run in runs.items():
            start = time.perf_counter()
            run()
            took = time.perf_counter() - start
            best[name] = min(best[name], took)
            spent += took
        rounds += 1
    return {name: (best[name], rounds) for name in runs}


def gain_difference(one: PredictiveGain, other: PredictiveGain) -> tuple[float, float]:
    """Largest absolute difference over Kh, Kx, Ku, Kr, and the same relative to max |K|."""
    diff = 0.0
    scale = 0.0
    for name in ("horizon", "state", "previous_input", "setpoint"):
        x, y = getattr(one, name), getattr(other, name)
        diff = max(diff, float(np.max(np.abs(x - y))))
        scale = max(scale, float(np.max(np.abs(x))))
    return diff, diff / scale if scale else diff


def format_time(seconds: float) -> str:
    if seconds < 1e-3:
        return f"{seconds * 1e6:7.1f} us"
    if seconds < 1.0:
        return f"{seconds * 1e3:7.2f} ms"
    return f"{seconds:7.3f} s "


def run_solver_benchmark(cases: list[Case], *, budget: float) -> list[dict[str, Any]]:
    """Time the four contenders on each case; return one row of figures per case."""
    rows = []
    for case in cases:
        plant = random_plant_for(case)
        g, diagonal = floor_inputs(plant)
        fast = best_of(
            {
                "design": lambda: movecast_design(plant),
                "gain": lambda: movecast_gain(plant),
                "floor": lambda: blas_floor(g, diagonal),
            },
            budget=budget,
        )
        (design_t, design_n), (gain_t, gain_n), (floor_t, floor_n) = fast.values()
        book_t, book_n = best_of({"textbook": lambda: textbook_gain(plant)}, budget=budget, most=50)["textbook"]
        design = design_controller(
            plant.a,
            plant.b,
            plant.c,
            output_weight=plant.output_weight,
            move_weight=plant.move_weight,
            prediction=case.prediction,
            control=case.control,
        )
        diff, rel = gain_difference(design.gain, textbook_gain(plant))
        rows.append(
            {
                "case": case,
                "hessian": case.control * case.inputs,
                "g_shape": g.shape,
                "design": design_t,
                "gain": gain_t,
                "textbook": book_t,
                "floor": floor_t,
                "repeats": (design_n, gain_n, book_n, floor_n),
                "diff": diff,
                "rel": rel,
                "cond": design.hessian.condition_number,
            }
        )
        print(
            f"  timed {case.name}: N = design {design_n}, gain {gain_n}, textbook {book_n}, floor {floor_n}", flush=True
        )
    return rows


def print_solver_table(rows: list[dict[str, Any]]) -> None:
    head = (
        f"{'case':<7} {'n':>4} {'m':>3} {'p':>3} {'Hp':>4} {'Hu':>3} {'G rows x cols':>14} "
        f"{'design':>10} {'gain only':>10} {'textbook':>10} {'floor':>10} "
        f"{'design/floor':>12} {'gain/floor':>10} {'book/design':>11} {'book/gain':>9} "
        f"{'max|dK|':>9} {'rel':>8} {'cond(H)':>8}"
    )
    print(head)
    print("-" * len(head))
    for row in rows:
        case: Case = row["case"]
        shape = f"{row['g_shape'][0]} x {row['g_shape'][1]}"
        print(
            f"{case.name:<7} {case.states:>4} {case.inputs:>3} {case.outputs:>3} {case.prediction:>4} "
            f"{case.control:>3} {shape:>14} {format_time(row['design']):>10} {format_time(row['gain']):>10} "
            f"{format_time(row['textbook']):>10} {format_time(row['floor']):>10} "
            f"{row['design'] / row['floor']:>11.2f}x {row['gain'] / row['floor']:>9.2f}x "
            f"{row['textbook'] / row['design']:>10.1f}x {row['textbook'] / row['gain']:>8.1f}x "
            f"{row['diff']:>9.2e} {row['rel']:>8.1e} {row['cond']:>8.1e}"
        )
    large = [row for row in rows if row["case"].name == "large"]
    if not large:
        print("\nTarget (large case): not measured (large case not selected).")
        return
    row = large[0]
    print("\nTarget, large case: within 2x of the floor and at least 10x faster than the textbook")
    for label, key in (("design_controller (whole design)", "design"), ("gain part alone", "gain")):
        ratio = row[key] / row["floor"]
        speedup = row["textbook"] / row[key]
        met = ratio <= FLOOR_RATIO_TARGET and speedup >= TEXTBOOK_SPEEDUP_TARGET
        print(
            f"  {label:<33} {ratio:5.2f}x the floor ({'met' if ratio <= FLOOR_RATIO_TARGET else 'not met'}), "
            f"{speedup:6.1f}x faster than the textbook "
            f"({'met' if speedup >= TEXTBOOK_SPEEDUP_TARGET else 'not met'}): {'met' if met else 'NOT MET'}"
        )


def print_profile(case: Case, *, top: int) -> None:
    """cProfile of a few ``design_controller`` runs on the case, by cumulative and own time."""
    plant = random_plant_for(case)
    movecast_design(plant)
    profiler = cProfile.Profile()
    profiler.enable()
    for _ in range(3):
        movecast_design(plant)
    profiler.disable()
    for order in ("cumulative", "tottime"):
        out = io.StringIO()
        pstats.Stats(profiler, stream=out).strip_dirs().sort_stats(order).print_stats(top)
        print(f"\ncProfile of 3 x design_controller, {case.name} case, sorted by {order}:")
        print("\n".join(line for line in out.getvalue().splitlines() if line.strip())[:6000])


def random_plant_for(case: Case) -> Plant:
    """The same plant the timing used for this case (plants are drawn in a fixed order)."""
    rng = np.random.default_rng(SEED)
    plants = {name: random_plant(c, rng) for name, c in CASES.items()}
    return plants[case.name]


# --------------------------------------------------------------------------- HTTP


def free_port() -> int:
    """A TCP port on the loopback interface that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def design_body(plant: Plant, *, variant: int = 0) -> dict[str, Any]:
    """The POST /design request for a plant (format of openapi/examples/design_request.json).

    ``variant`` > 0 scales ``A`` by ``1 - 1e-9 variant``: the same design to the eye, another
    plant to the solvers' plant cache (``service.solver.memo``), so that every request of a
    run over many variants is computed afresh.
    """
    case = plant.case
    return {
        "model": {
            "kind": "state_space",
            "a": (plant.a * (1.0 - 1e-9 * variant)).tolist(),
            "b": plant.b.tolist(),
            "c": plant.c.tolist(),
            "time_domain": "discrete",
            "sample_time": 1.0,
        },
        "horizons": {"prediction": case.prediction, "control": case.control, "first_penalized": 1},
        "weights": {"output": plant.output_weight.tolist(), "move": plant.move_weight.tolist()},
    }


def wait_until_healthy(base: str, server: subprocess.Popen[bytes], *, timeout: float) -> bool:
    import httpx

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if server.poll() is not None:
            return False
        try:
            if httpx.get(f"{base}/healthz", timeout=1.0).status_code == 200:
                return True
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    return False


@contextlib.contextmanager
def local_server(*, timeout: float) -> Iterator[tuple[str, subprocess.Popen[bytes]] | None]:
    """``movecast serve`` on a free loopback port (log level warning), stopped on leaving.

    Yields the base URL and the process, or None (after printing why) when it did not answer
    ``GET /healthz`` within ``timeout`` seconds.
    """
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    env = dict(os.environ, MOVECAST_LOG_LEVEL="warning")  # no access log line per request
    command = [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port", str(port)]
    server = subprocess.Popen(command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        if wait_until_healthy(base, server, timeout=timeout):
            yield base, server
        else:
            print(f"  the server did not answer GET /healthz within {timeout:g} s (exit status {server.poll()})")
            yield None
    finally:
        server.terminate()
        try:
            server.wait(timeout=20.0)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait(timeout=10.0)


def load(
    base: str,
    method: str,
    path: str,
    body: dict[str, Any] | None,
    *,
    seconds: float,
    concurrency: int,
    payload: bytes | None = None,
    timeout: float = 30.0,
    payloads: list[bytes] | None = None,
    headers: dict[str, str] | None = None,
) -> dict[str, Any]:
    """Send requests from ``concurrency`` threads for ``seconds``; count and time them.

    The request carries ``body`` as JSON, or ``payload`` as it is (already encoded JSON), or
    each thread cycles through ``payloads`` (starting at its own offset); ``headers`` go with
    every request (``{"cache-control": "no-store"}``: computed each time, never from the
    server's answer cache).
    """
    import httpx
    from raw_load import run_clients

    extra = dict(headers or {})
    json_headers = {"content-type": "application/json", **extra}
    send: dict[str, Any] = (
        {"json": body, "headers": extra} if payload is None else {"content": payload, "headers": json_headers}
    )

    latencies: list[list[float]] = [[] for _ in range(concurrency)]
    errors = [0] * concurrency
    start_gate = threading.Barrier(concurrency + 1)
    deadline_box: list[float] = []

    def worker(slot: int) -> None:
        turn = slot * 7

        def next_send() -> dict[str, Any]:
            nonlocal turn
            if not payloads:
                return send
            turn += 1
            return {"content": payloads[turn % len(payloads)], "headers": json_headers}

        with httpx.Client(base_url=base, timeout=timeout) as client:
            client.request(method, path, **next_send())  # connect and warm up, not counted
            start_gate.wait()
            deadline = deadline_box[0]
            while time.perf_counter() < deadline:
                began = time.perf_counter()
                try:
                    ok = client.request(method, path, **next_send()).status_code == 200
                except httpx.HTTPError:
                    ok = False
                if ok:
                    latencies[slot].append(time.perf_counter() - began)
                else:
                    errors[slot] += 1

    tally: dict[str, Any] = run_clients(
        worker, latencies, errors, start_gate, deadline_box, seconds=seconds, timeout=timeout
    )
    return tally


def run_http_benchmark(*, seconds: float, concurrency: int) -> None:
    import httpx

    plant = random_plant_for(CASES["small"])
    body = design_body(plant)
    with local_server(timeout=30.0) as served_by:
        if served_by is None:
            return
        base, _ = served_by
        port = base.rsplit(":", 1)[1]
        answer = httpx.post(f"{base}/design", json=body, timeout=30.0)
        if answer.status_code != 200:
            print(f"POST /design answered {answer.status_code}: {answer.text[:500]}")
            return
        served = np.array(answer.json()["gain"]["state"])
        direct = movecast_design(plant).state
        print(
            f"server on 127.0.0.1:{port} (1 worker, log level warning); {concurrency} client threads, "
            f"{seconds:g} s per endpoint; POST /design small case: |Kx served - Kx direct| = "
            f"{np.max(np.abs(served - direct)):.1e}, body {len(answer.request.content)} bytes in, "
            f"{len(answer.content)} bytes out"
        )
        head = f"{'endpoint':<14} {'requests':>9} {'errors':>7} {'requests/s':>11} {'p50':>10} {'p99':>10}"
        print(head)
        print("-" * len(head))
        for label, method, path, payload, headers in (
            ("GET /healthz", "GET", "/healthz", None, None),
            # no-store: the same body designed each time, not answered from the answer cache
            ("POST /design", "POST", "/design", body, {"cache-control": "no-store"}),
            ("  repeated", "POST", "/design", body, None),
        ):
            got = load(base, method, path, payload, seconds=seconds, concurrency=concurrency, headers=headers)
            print(
                f"{label:<14} {got['ok']:>9} {got['errors']:>7} {got['rate']:>11.1f} "
                f"{format_time(got['p50']):>10} {format_time(got['p99']):>10}",
                flush=True,
            )


# --------------------------------------------------------------------------- main


def load_average() -> str:
    """The 1, 5 and 15 minute load averages, or "n/a" where the platform has none."""
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        return "n/a"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", default="small,medium,large", help="comma-separated: small, medium, large")
    parser.add_argument("--budget", type=float, default=3.0, help="seconds of timed rounds per case (default 3)")
    parser.add_argument("--seconds", type=float, default=5.0, help="seconds of load per endpoint (default 5)")
    parser.add_argument("--concurrency", type=int, default=4, help="client threads (default 4)")
    parser.add_argument("--skip-http", action="store_true", help="do not start a server")
    parser.add_argument("--profile", action="store_true", help="cProfile design_controller on the largest case")
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    names = [name.strip() for name in args.cases.split(",") if name.strip()]
    unknown = [name for name in names if name not in CASES]
    if unknown:
        print(f"unknown case(s) {', '.join(unknown)}; choose from {', '.join(CASES)}", file=sys.stderr)
        return 2
    cases = [CASES[name] for name in names]
    print(
        f"python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"{os.cpu_count()} CPUs, {platform.machine()}; seed {SEED}; best of N, budget {args.budget:g} s; "
        f"load average {load_average()}"
    )
    threads = {
        k: os.environ[k] for k in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS") if k in os.environ
    }
    print(f"BLAS threads: {', '.join(f'{k}={v}' for k, v in threads.items()) or 'library default (one per CPU)'}")
    if cases:
        print("\nSolver against the textbook version and the BLAS floor (G'G + Cholesky):")
        rows = run_solver_benchmark(cases, budget=args.budget)
        print()
        print_solver_table(rows)
        print(
            "\ndesign = design_controller (incl. Hessian eigenvalues, closed-loop poles); "
            "gain only = prediction..first_move_gain;\nmax|dK| = largest |movecast - textbook| "
            "over Kh, Kx, Ku, Kr; rel = that over max |K|;\n"
            "cond(H) = the Hessian's 2-norm condition number (the textbook inverse loses about log10 of it in digits)."
        )
        if args.profile:
            print_profile(cases[-1], top=15)
    if not args.skip_http:
        print(f"\nload average before the HTTP part: {load_average()}")
        print("\nHTTP on one real server:")
        run_http_benchmark(seconds=args.seconds, concurrency=args.concurrency)
    print(f"\nload average at the end: {load_average()} (other work on the machine inflates every figure)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
