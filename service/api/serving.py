"""Run the service under uvicorn: JSON logs, no uvicorn access log, graceful shutdown.

Connections are handled by :class:`service.api.protocol.GuardedH11Protocol` (problem
details for malformed HTTP, a read deadline, a connection cap); idle kept-alive connections
close after ``MOVECAST_KEEP_ALIVE_SECONDS``.

``movecast serve`` sizes the BLAS/OpenMP pools and, with several workers, prepares
prometheus-client's multiprocess folder *before* numpy or prometheus-client is imported
(both read their environment once, at import); then it calls :func:`run_server`.

On SIGTERM uvicorn stops accepting connections, /readyz turns 503 (the hook installed by
:mod:`service.api.operations`), in-flight requests finish within the grace period (the
compute time limit plus a margin, so a request that started is always answered) and the
process exits with status 0.
"""

from __future__ import annotations

import ctypes
import math
import multiprocessing
import os
import signal
import sys
from types import FrameType

from service.api.logs import logging_config
from service.api.settings import Settings

__all__ = [
    "GRACE_MARGIN_SECONDS",
    "MMAP_THRESHOLD_BYTES",
    "graceful_shutdown_seconds",
    "return_large_blocks",
    "run_server",
    "stop_with_the_supervisor",
]

#: Seconds added to the compute time limit for answering the last requests.
GRACE_MARGIN_SECONDS = 5

#: Blocks above this size are mapped on their own, so that memory freed goes back to the system.
MMAP_THRESHOLD_BYTES = 1024 * 1024
#: ``M_MMAP_THRESHOLD`` of glibc's ``mallopt`` (malloc.h).
_M_MMAP_THRESHOLD = -3


def return_large_blocks(threshold: int = MMAP_THRESHOLD_BYTES) -> bool:
    """Have glibc map every block above ``threshold`` bytes on its own (``mallopt(M_MMAP_THRESHOLD)``).

    By default glibc raises that threshold each time a large block is freed, so the next answers
    of tens of MiB come from the heap of whichever thread built them and stay there after they
    are sent: three answers one after another, each built in another worker thread, kept the
    serving process about three answers above its rest although only one was ever held at a
    time (``tests/bench/bench_answer_memory.py``; with the threshold fixed it comes back to
    rest).  A fixed threshold also turns that adjustment off.  Called at each serving
    process's start-up (``service.api.operations``), not in the solver processes: there every
    large temporary would be mapped afresh, which cost the large benchmark design about 20 ms
    over HTTP, and their memory is bounded by the caps anyway.

    Returns whether the C library took it (False off glibc, where this does nothing).
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, threshold))


#: ``PR_SET_PDEATHSIG`` of Linux's ``prctl`` (linux/prctl.h).
_PR_SET_PDEATHSIG = 1


def stop_with_the_supervisor() -> bool:
    """In a worker of a multi-process server, have the kernel send it SIGTERM when its supervisor dies.

    uvicorn's workers (``MOVECAST_WORKERS`` > 1) do not watch their supervisor: one killed
    outright (SIGKILL, the OOM killer) left every worker serving on the shared socket, with
    its solver processes, holding the port against a restart.  With ``PR_SET_PDEATHSIG``
    (Linux ``prctl(2)``) such a worker gets SIGTERM and shuts down as gracefully as on a
    normal stop: in-flight requests finish, the solvers exit with it.  Called at each serving
    process's start-up; a process started by no Python parent (``movecast serve`` with one
    worker) is left alone.  Returns whether the request was made.
    """
    parent = multiprocessing.parent_process()
    if parent is None or not sys.platform.startswith("linux"):
        return False
    try:
        prctl = ctypes.CDLL(None, use_errno=True).prctl
    except (OSError, AttributeError):
        return False
    if prctl(_PR_SET_PDEATHSIG, int(signal.SIGTERM), 0, 0, 0) != 0:
        return False
    if os.getppid() != parent.pid:  # it died before the request was made
        os.kill(os.getpid(), signal.SIGTERM)
    return True


def graceful_shutdown_seconds(settings: Settings) -> int:
    """How long shutdown waits for in-flight requests: the time limit plus a margin."""
    return math.ceil(settings.request_timeout_seconds) + GRACE_MARGIN_SECONDS


def _ignore(signum: int, frame: FrameType | None) -> None:
    """Placeholder handler: uvicorn re-raises the signal it stopped on once it is done."""


def run_server(settings: Settings, *, host: str, port: int, workers: int) -> int:
    """Serve until stopped; return the exit status (0 after a graceful shutdown)."""
    import uvicorn

    from service.api.logs import log_warnings
    from service.api.protocol import GuardedH11Protocol

    log_warnings()

    # uvicorn restores the handlers it found and raises the stopping signal again after a
    # graceful shutdown; with these in place that ends in a clean exit, not a kill.
    signal.signal(signal.SIGTERM, _ignore)
    signal.signal(signal.SIGINT, _ignore)
    uvicorn.run(
        "service.api.app:create_app",
        factory=True,
        host=host,
        port=port,
        workers=workers,
        log_level=settings.log_level,
        log_config=logging_config(settings.log_level),
        access_log=False,
        timeout_graceful_shutdown=graceful_shutdown_seconds(settings),
        http=GuardedH11Protocol,
        timeout_keep_alive=settings.keep_alive_seconds,
    )
    return 0
