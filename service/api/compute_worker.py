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
import traceback
import warnings
from collections.abc import Callable
from multiprocessing.connection import Connection
from typing import Any

from service.errors import InvalidRequest, MovecastError, NumericalError

__all__ = ["Outcome", "serve_calls"]

#: ("ok", value, seconds, warnings), ("error", kind, cls, state, seconds, warnings),
#: ("memory", seconds, warnings) or ("crash", type name, traceback text, warnings); warnings
#: are (category, message) pairs, logged by the serving process as JSON.
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
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("default")
        try:
            value = call(*args)
        except MovecastError as exc:
            outcome: Outcome = ("error", *_error_state(exc), time.perf_counter() - start)
        except MemoryError:
            outcome = ("memory", time.perf_counter() - start)
        except Exception as exc:
            outcome = ("crash", type(exc).__name__, traceback.format_exc())
        else:
            outcome = ("ok", value, time.perf_counter() - start)
    seen = list(dict.fromkeys((w.category.__name__, str(w.message)) for w in caught))
    return (*outcome, seen[:20])


def serve_calls(conn: Connection, blas_threads: int, niceness: int = 0) -> None:
    """Answer calls sent on ``conn`` until it closes.

    Parameters
    ----------
    conn : Connection
        Receives ``(callable, args)`` pickles, sends an :data:`Outcome` per call.  A
        ``MemoryError`` is sent back as ``("memory", ...)``; any other exception that is not
        a movecast one as ``("crash", type name, traceback)``, which the serving process
        logs (never answers).  Warnings raised during a call travel with its outcome
        instead of reaching standard error as raw text.
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
        except Exception as exc:  # the outcome itself could not be sent (e.g. not picklable)
            try:
                conn.send(("crash", type(exc).__name__, traceback.format_exc(), []))
            except (OSError, pickle.PicklingError):
                return
