"""The work of one compute process: receive a call, run it, send back the outcome.

Runs in a child process started by :mod:`service.api.compute`.  It ignores SIGINT and SIGTERM
(the serving process decides when work stops) and exits when its pipe closes, so it never
outlives the process that started it.
"""

from __future__ import annotations

import os
import pickle
import signal
import time
from collections.abc import Callable
from multiprocessing.connection import Connection
from typing import Any

from service.errors import InvalidRequest, MovecastError, NumericalError

__all__ = ["Outcome", "serve_calls"]

#: ("ok", value, seconds) or ("error", kind, state, seconds).
Outcome = tuple[Any, ...]


def _error_state(exc: MovecastError) -> Outcome:
    """Describe a movecast exception by its class and attributes (its args do not rebuild it)."""
    if isinstance(exc, InvalidRequest):
        return ("invalid", type(exc), {"problems": exc.problems})
    if isinstance(exc, NumericalError):
        return ("numerical", type(exc), {"detail": exc.detail, "field": exc.field})
    return ("other", type(exc), {"message": str(exc)})


def rebuild_error(kind: str, cls: type[MovecastError], state: dict[str, Any]) -> MovecastError:
    """Rebuild the exception described by :func:`_error_state` in the serving process."""
    if kind == "invalid":
        return cls(state["problems"])
    if kind == "numerical":
        return cls(state["detail"], field=state["field"])  # type: ignore[call-arg]
    return cls(state["message"])


def _run(call: Callable[..., Any], args: tuple[Any, ...]) -> Outcome:
    start = time.perf_counter()
    try:
        value = call(*args)
    except MovecastError as exc:
        return ("error", *_error_state(exc), time.perf_counter() - start)
    return ("ok", value, time.perf_counter() - start)


def serve_calls(conn: Connection, blas_threads: int, niceness: int = 0) -> None:
    """Answer calls sent on ``conn`` until it closes.

    Parameters
    ----------
    conn : Connection
        Receives ``(callable, args)`` pickles, sends an :data:`Outcome` per call.  Any
        exception other than a movecast one is sent back as ``("crash", type name)``;
        its traceback stays in this process's standard error.
    blas_threads : int
        Threads of the BLAS/OpenMP pools in this process (threadpoolctl).
    niceness : int
        Added to this process's niceness (``os.nice``): the heavy lane yields the CPU to
        the light one.
    """
    if niceness:
        os.nice(niceness)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=blas_threads)
    while True:
        try:
            call, args = conn.recv()
        except (EOFError, OSError):
            return
        try:
            outcome = _run(call, args)
            conn.send(outcome)
        except (EOFError, OSError, BrokenPipeError):
            return
        except Exception as exc:
            try:
                conn.send(("crash", type(exc).__name__))
            except (OSError, pickle.PicklingError):
                return
