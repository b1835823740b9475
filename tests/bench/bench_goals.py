"""The performance goals, each as a ratio against its floor measured in the same run.

Run from the repository root (it starts ``movecast serve`` on a free loopback port and stops
it at the end; every load loop is bounded in time)::

    python tests/bench/bench_goals.py [--seconds 5] [--skip-http]

1. Large design (200 states, 20 x 20, Hp 200, Hu 50): the whole ``run_design`` (every
   diagnostic) in this process, and ``POST /design`` one at a time, against numpy's floor
   (``G'G`` plus one Cholesky factorization of that size), best of N.  Goals: at most 2x
   and 3x.
2. Light behind heavy: small ``POST /design`` p99 from 4 clients while 2 clients keep the
   heavy lane busy with the large design.  Goal: under 100 ms.
3. Small design against ``GET /healthz`` on the same server at 16 clients (goal: at least
   0.6x the rate), and its p99 at 4 clients (goal: under 50 ms), from raw keep-alive sockets
   (``raw_load.py``): 16 httpx threads cost the client as much CPU per request as the server
   spends, so with httpx the client would set both rates.  On Linux it also prints the
   serving process's own CPU per answer (``/proc``), the figure the ratio's arithmetic rests on.
4. ``POST /simulate`` of the bundled example and of the limits example: simulated steps per
   second, one client (goal of the issue: 2x the figure before it; printed for the record).

Every request is sent with ``Cache-Control: no-store``, so the server computes it (never
from its answer cache), except the rows marked "answer cache" of goal 3: the same small body
again, answered from the serving process's cache (``service/api/answer_cache.py``).

This is a script, not a test: it prints figures and asserts nothing.  The machine's load
average is printed before and after: other work inflates every figure, ratios less so.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import threading
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
for path in (ROOT, ROOT / "tests" / "bench"):
    if str(path) not in sys.path:
        sys.path.insert(0, str(path))

from bench_design import (  # noqa: E402
    CASES,
    blas_floor,
    design_body,
    floor_inputs,
    format_time,
    load,
    load_average,
    local_server,
    random_plant_for,
)
from raw_load import encode_request, raw_load  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

from service.api.settings import Settings  # noqa: E402
from service.pipeline.design import run_design  # noqa: E402
from service.schemas.design import DesignRequest  # noqa: E402
from service.solver.memo import clear_plant_caches  # noqa: E402

__all__ = ["main"]

EXAMPLES = ROOT / "openapi" / "examples"


def verdict(ok: bool) -> str:
    return "met" if ok else "NOT met"


def best(call: Any, *, rounds: int) -> float:
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return min(times)


def goal_one_solver(rounds: int) -> tuple[float, dict[str, Any]]:
    """Floor and run_design of the large case, interleaved, one BLAS thread (as a solver runs)."""
    plant = random_plant_for(CASES["large"])
    body = design_body(plant)
    request = DesignRequest.model_validate(body)
    caps = Settings().caps()
    g, diagonal = floor_inputs(plant)

    def fresh() -> None:
        clear_plant_caches()
        run_design(request, caps)

    with threadpool_limits(limits=1):
        run_design(request, caps)
        floor, whole, seen = [], [], []
        for _ in range(rounds):
            floor.append(best(lambda: blas_floor(g, diagonal), rounds=1))
            whole.append(best(fresh, rounds=1))
            seen.append(best(lambda: run_design(request, caps), rounds=1))
        answer = run_design(request, caps)
    f, w, v = min(floor), min(whole), min(seen)
    print(f"  floor (G'G + Cholesky, 1 thread)      {format_time(f)}")
    print(
        f"  run_design, every diagnostic           {format_time(w)}   {w / f:5.2f}x the floor (goal <= 2x: {verdict(w / f <= 2.0)})"
    )
    print(f"  the same, a plant seen before (cached) {format_time(v)}   {v / f:5.2f}x the floor")
    assert answer.diagnostics is not None
    print(
        f"  diagnostics computed: {', '.join(answer.diagnostics.computed)}; Hessian eigenvalues by "
        f"{answer.diagnostics.hessian_eigenvalue_method}; skipped: {answer.diagnostics.skipped or 'none'}"
    )
    return f, body


def latencies(
    base: str,
    method: str,
    path: str,
    payload: bytes | None,
    *,
    seconds: float,
    clients: int,
    payloads: list[bytes] | None = None,
    headers: dict[str, str] | None = None,
) -> dict[str, float]:
    """:func:`bench_design.load` with an encoded body (or bodies), a 60 s client timeout, float counts."""
    got = load(
        base,
        method,
        path,
        None,
        seconds=seconds,
        concurrency=clients,
        payload=payload,
        timeout=60.0,
        payloads=payloads,
        headers=headers,
    )
    return {key: float(value) for key, value in got.items()}


def row(label: str, got: dict[str, float]) -> None:
    print(
        f"  {label:<44} {int(got['ok']):>6} ok {int(got['errors']):>4} errors {got['rate']:>8.1f}/s "
        f"p50 {format_time(got['p50'])} p99 {format_time(got['p99'])}",
        flush=True,
    )


def process_cpu_seconds(pid: int) -> float | None:
    """User plus system CPU seconds of one process, all its threads (``/proc``; None elsewhere).

    Not its children: the solver processes are children of the fork server, not of the
    serving process, so this is the serving process's own share.
    """
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def serving_cpu(pid: int | None, run: Any) -> dict[str, Any]:
    """``run()``'s result with ``serving_cpu``: the serving process's CPU seconds per answer (None: unknown)."""
    before = process_cpu_seconds(pid) if pid is not None else None
    got = dict(run())
    after = process_cpu_seconds(pid) if pid is not None else None
    spent = None if before is None or after is None or not got["ok"] else (after - before) / got["ok"]
    return {**got, "serving_cpu": spent}


def goal_three(port: int, small_body: bytes, *, seconds: float, server_pid: int | None = None) -> None:
    """Small designs against /healthz from a client light enough that the server sets the rate.

    With ``server_pid`` (Linux), also the serving process's own CPU per answer, from ``/proc``
    (clock ticks, so a few percent): the figure the rate ratio's arithmetic rests on.
    """
    fresh_only = {"Cache-Control": "no-store"}
    # 200 variants of the small plant: more than every solver's plant cache holds, so each
    # request is designed afresh; the same body again shows a plant seen before.
    small = random_plant_for(CASES["small"])
    fresh = [
        encode_request("POST", "/design", json.dumps(design_body(small, variant=k + 1)).encode(), fresh_only)
        for k in range(200)
    ]
    same = [encode_request("POST", "/design", small_body, fresh_only)]
    repeated = [encode_request("POST", "/design", small_body)]  # no no-store: from the answer cache
    health = serving_cpu(
        server_pid, lambda: raw_load(port, [encode_request("GET", "/healthz", None)], seconds=seconds, clients=16)
    )
    design16 = serving_cpu(server_pid, lambda: raw_load(port, fresh, seconds=seconds, clients=16))
    design4 = raw_load(port, fresh, seconds=seconds, clients=4)
    seen16 = raw_load(port, same, seconds=seconds, clients=16)
    seen4 = raw_load(port, same, seconds=seconds, clients=4)
    repeat16 = serving_cpu(server_pid, lambda: raw_load(port, repeated, seconds=seconds, clients=16))
    repeat4 = raw_load(port, repeated, seconds=seconds, clients=4)
    row("GET /healthz, 16 clients", health)
    row("small POST /design, 16 clients", design16)
    row("small POST /design, 4 clients", design4)
    row("  the same plant each time, 16 clients", seen16)
    row("  the same plant each time, 4 clients", seen4)
    row("  the same body again (answer cache), 16", repeat16)
    row("  the same body again (answer cache), 4", repeat4)
    cpu = max(got["client_cpu"] for got in (health, design16, repeat16))
    print(f"  the client's own CPU: at most {format_time(cpu)} per request")
    spent = [
        (label, got["serving_cpu"])
        for label, got in (("/healthz", health), ("a small design", design16), ("an answer from the cache", repeat16))
    ]
    if all(value is not None for _, value in spent):
        print(
            "  the serving process's own CPU per answer at 16 clients: "
            + ", ".join(f"{label} {format_time(value)}" for label, value in spent)
        )

    def against_health(got: dict[str, float]) -> float:
        return got["rate"] / health["rate"] if health["rate"] else float("nan")

    ratio = against_health(design16)
    print(f"  rate ratio at 16 clients {ratio:.2f}x (goal >= 0.6x: {verdict(ratio >= 0.6)})")
    print(f"  p99 at 4 clients {format_time(design4['p99'])} (goal < 50 ms: {verdict(design4['p99'] < 0.05)})")
    print(
        f"  a plant seen before: {against_health(seen16):.2f}x the /healthz rate, "
        f"p99 at 4 clients {format_time(seen4['p99'])}"
    )
    print(
        f"  a body answered before (answer cache): {against_health(repeat16):.2f}x the /healthz rate, "
        f"p99 at 4 clients {format_time(repeat4['p99'])}"
    )


def http_goals(floor: float, large: dict[str, Any], *, seconds: float, rounds: int) -> None:
    import httpx

    with local_server(timeout=180.0) as served_by:
        if served_by is None:
            return
        base, server = served_by
        port = int(base.rsplit(":", 1)[1])
        large_body = json.dumps(large).encode()
        small_body = json.dumps(design_body(random_plant_for(CASES["small"]))).encode()
        # no-store: every request is computed, never answered from the server's answer cache
        # (a repeat of a body the server has answered is measured apart, in goal 3).
        fresh_only = {"cache-control": "no-store"}
        headers = {"content-type": "application/json", **fresh_only}
        with httpx.Client(base_url=base, timeout=120.0) as client:
            first = client.post("/design", content=large_body, headers=headers)
            print(
                f"  server on 127.0.0.1:{port} (defaults); large design answered {first.status_code}, {len(first.content):,} bytes"
            )
            seen = best(lambda: client.post("/design", content=large_body, headers=headers), rounds=rounds)
            variants = iter(
                [
                    json.dumps(design_body(random_plant_for(CASES["large"]), variant=k + 1)).encode()
                    for k in range(rounds)
                ]
            )
            took = best(lambda: client.post("/design", content=next(variants), headers=headers), rounds=rounds)
        print(
            f"  POST /design large, one at a time        {format_time(took)}   {took / floor:5.2f}x the floor "
            f"(goal <= 3x: {verdict(took / floor <= 3.0)})"
        )
        print(f"  the same, a plant seen before (cached)  {format_time(seen)}   {seen / floor:5.2f}x the floor")

        print("\n2. Small designs while the heavy lane is saturated (2 clients posting the large design):")
        heavy: dict[str, dict[str, float]] = {}
        hold = threading.Thread(
            target=lambda: heavy.setdefault(
                "got",
                latencies(base, "POST", "/design", large_body, seconds=seconds + 4.0, clients=2, headers=fresh_only),
            ),
            daemon=True,
        )
        hold.start()
        time.sleep(2.0)  # let the heavy requests occupy their lane
        light = latencies(base, "POST", "/design", small_body, seconds=seconds, clients=4, headers=fresh_only)
        hold.join(timeout=seconds + 180.0)
        row("small POST /design, 4 clients", light)
        if "got" in heavy:
            row("large POST /design, 2 clients (heavy lane)", heavy["got"])
        print(f"  small p99 {format_time(light['p99'])} (goal < 100 ms: {verdict(light['p99'] < 0.1)})")

        print("\n3. Small design against /healthz on the same server (raw keep-alive sockets, raw_load.py):")
        goal_three(port, small_body, seconds=seconds, server_pid=server.pid)

        print("\n4. POST /simulate, one client:")
        for name in ("simulate_request.json", "simulate_request_limits.json"):
            body = (EXAMPLES / name).read_bytes()
            steps = json.loads(body)["scenario"]["steps"]
            got = latencies(base, "POST", "/simulate", body, seconds=seconds, clients=1, headers=fresh_only)
            row(f"{name} ({steps} steps)", got)
            print(f"  {'':<44} {got['rate'] * steps:,.0f} simulated steps per second")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=5.0, help="seconds of each load phase (default 5)")
    parser.add_argument("--rounds", type=int, default=5, help="best of this many for the large design (default 5)")
    parser.add_argument("--skip-http", action="store_true", help="do not start a server")
    args = parser.parse_args(argv)
    print(
        f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}; python {platform.python_version()}, "
        f"{os.cpu_count()} CPUs, {platform.machine()}; load average {load_average()}"
    )
    print("\n1. Large design (200 states, 20 x 20, Hp 200, Hu 50) against numpy's floor:")
    floor, large = goal_one_solver(args.rounds)
    if not args.skip_http:
        http_goals(floor, large, seconds=args.seconds, rounds=args.rounds)
    print(f"\nload average at the end: {load_average()} (other work on the machine inflates every figure)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
