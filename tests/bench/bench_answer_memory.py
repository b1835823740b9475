"""What large answers cost the serving process in memory while it holds and sends them.

Run from the repository root (it starts ``movecast serve`` on a free loopback port and stops
it at the end; every request has a client timeout)::

    python tests/bench/bench_answer_memory.py [--signals 80] [--prediction 200] [--clients 1 3]

The request is a design inside every default cap whose answer is large: a random stable plant
of 10 states with ``--signals`` inputs and as many outputs, Hp ``--prediction`` and Hu 1, so
the horizon gain holds ``signals^2 * Hp`` numbers.  For each count of simultaneous clients it
prints the answer's size and the serving process's resident memory (``VmRSS``) and its peak
(``VmHWM``) from ``/proc`` before and after, and the peak's rise in copies of one answer.

The serving process holds each answer's estimated bytes until its last byte is sent, at most
``MOVECAST_MAX_ANSWER_MEMORY_BYTES`` in all (``service/api/answer_memory.py``; the pod budget of
``tests/api/test_memory_bound.py`` counts that bound): with the defaults, one of these answers
fits at a time, and the others wait for room.  Linux only (it reads ``/proc``).  A script, not a test: it prints figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import sys
import threading
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
for path in (ROOT, ROOT / "tests" / "bench"):
    if str(path) not in sys.path:
        sys.path.insert(0, str(path))

from bench_design import load_average, local_server  # noqa: E402

from tests.conftest import random_design_request  # noqa: E402

MIB = 1024 * 1024


def memory_mib(pid: int) -> tuple[float, float]:
    """``VmRSS`` and ``VmHWM`` of a process, MiB."""
    fields = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        fields[key] = value.split()
    return int(fields["VmRSS"][0]) / 1024, int(fields["VmHWM"][0]) / 1024


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--signals", type=int, default=80)
    parser.add_argument("--prediction", type=int, default=200)
    parser.add_argument("--clients", type=int, nargs="+", default=[1, 3])
    args = parser.parse_args(argv)
    import httpx

    print(f"load average {load_average()}; {args.signals} x {args.signals}, Hp {args.prediction}, Hu 1")
    with local_server(timeout=180.0) as served_by:
        if served_by is None:
            return 1
        base, server = served_by
        rng = np.random.default_rng(5)
        body = random_design_request(rng, states=10, signals=args.signals, prediction=args.prediction, control=1)
        headers = {"Cache-Control": "no-store"}  # computed each time, kept nowhere
        for clients in args.clients:
            rss, peak = memory_mib(server.pid)
            got: list[tuple[int, int]] = []

            def post() -> None:
                answer = httpx.post(f"{base}/design", json=body, headers=headers, timeout=300.0)
                got.append((answer.status_code, len(answer.content)))

            threads = [threading.Thread(target=post) for _ in range(clients)]
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join(timeout=600.0)
            after_rss, after_peak = memory_mib(server.pid)
            statuses = sorted({status for status, _ in got})
            size = max((length for _, length in got), default=0) / MIB
            rise = after_peak - peak
            copies = f"{rise / size:.1f} answers" if size else "n/a"
            print(
                f"{clients} client(s): status {statuses}, answer {size:.1f} MiB; serving process "
                f"RSS {rss:.0f} -> {after_rss:.0f} MiB, peak {peak:.0f} -> {after_peak:.0f} MiB "
                f"(rise {rise:.0f} MiB, {copies})",
                flush=True,
            )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
