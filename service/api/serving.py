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

import math
import signal
from types import FrameType

from service.api.logs import logging_config
from service.api.settings import Settings

__all__ = ["GRACE_MARGIN_SECONDS", "graceful_shutdown_seconds", "run_server"]

#: Seconds added to the compute time limit for answering the last requests.
GRACE_MARGIN_SECONDS = 5


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
