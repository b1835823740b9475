"""The answers the serving process holds at once, bounded in bytes.

A solver writes its answer and moves on; the serving process then holds the answer until the
client has read its last byte, and a slow reader holds it long after its solver is free.  So the
solver processes' caps alone do not bound the pod: answers in flight are bounded by
connections, not by solvers.  This module bounds them by bytes instead.

Before a request's first solver call, :class:`AnswerHold` reserves the bytes its answer will
take in this process, estimated from its sizes (``MemoryEstimate.served``,
:func:`service.pipeline.estimates.served_answer_bytes`), from the process's
:class:`AnswerMemory` of ``MOVECAST_MAX_ANSWER_MEMORY_BYTES``.  A request that does not fit beside
the answers in flight waits for room, within its time limit (then a 503 with ``Retry-After``)
and until its client leaves; one whose answer alone is larger was refused earlier with a 422
(:func:`service.pipeline.memory.check_request_memory`).  :class:`AnswerMemoryMiddleware` gives
each request its hold and releases it when the response has been sent, or has failed.

Answers from the answer cache are not counted here: the cache's own bytes bound them.
"""

from __future__ import annotations

import threading
import time

from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.metrics import ANSWER_MEMORY
from service.errors import AnswerMemoryFull, Cancelled

__all__ = ["HOLD_KEY", "AnswerHold", "AnswerMemory", "AnswerMemoryMiddleware"]

#: The ASGI scope's key of a request's :class:`AnswerHold`.
HOLD_KEY = "movecast.answer_hold"

#: Seconds between two looks at a request's cancellation while it waits for room.
_POLL_SECONDS = 0.05


class AnswerMemory:
    """Bytes of answers held by this serving process, at most ``limit`` at once.

    Thread-safe: requests reserve from their worker threads, or from the event loop without
    waiting (:meth:`try_reserve`), and release from the event loop.
    """

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.held = 0
        self._room = threading.Condition()

    def reserve(self, nbytes: int, *, deadline: float, seconds: float, cancel: threading.Event | None = None) -> None:
        """Take ``nbytes`` (at most ``limit``), waiting for room until ``deadline`` (``time.monotonic``).

        Raises
        ------
        AnswerMemoryFull
            The deadline passed before the bytes were free (``seconds``: the request's time limit).
        Cancelled
            ``cancel`` was set while waiting (the client left).
        """
        nbytes = min(nbytes, self.limit)  # one answer larger than the whole was refused earlier
        with self._room:
            while self.held + nbytes > self.limit:
                if cancel is not None and cancel.is_set():
                    raise Cancelled
                left = deadline - time.monotonic()
                if left <= 0:
                    raise AnswerMemoryFull(seconds, self.held, self.limit)
                self._room.wait(min(left, _POLL_SECONDS))
            self.held += nbytes
            ANSWER_MEMORY.set(self.held)

    def try_reserve(self, nbytes: int) -> bool:
        """Take ``nbytes`` (at most ``limit``) if they are free now, without waiting; whether it did."""
        nbytes = min(nbytes, self.limit)
        with self._room:
            if self.held + nbytes > self.limit:
                return False
            self.held += nbytes
            ANSWER_MEMORY.set(self.held)
            return True

    def release(self, nbytes: int) -> None:
        """Give ``nbytes`` back and wake the requests waiting for room."""
        with self._room:
            self.held -= nbytes
            ANSWER_MEMORY.set(self.held)
            self._room.notify_all()


class AnswerHold:
    """The bytes one request holds in its process's :class:`AnswerMemory`, released once."""

    def __init__(self, memory: AnswerMemory) -> None:
        self.memory = memory
        self.held = 0

    def take(self, nbytes: float, *, deadline: float, seconds: float, cancel: threading.Event | None = None) -> None:
        """Hold at least ``nbytes`` for this request (only the part not yet held is reserved)."""
        extra = min(int(nbytes), self.memory.limit) - self.held
        if extra > 0:
            self.memory.reserve(extra, deadline=deadline, seconds=seconds, cancel=cancel)
            self.held += extra

    def try_take(self, nbytes: float) -> bool:
        """:meth:`take` if the bytes are free now (true also when they are held already); never waits."""
        extra = min(int(nbytes), self.memory.limit) - self.held
        if extra <= 0:
            return True
        if not self.memory.try_reserve(extra):
            return False
        self.held += extra
        return True

    def release(self) -> None:
        """Give back everything this request holds (idempotent)."""
        held, self.held = self.held, 0
        if held:
            self.memory.release(held)


class AnswerMemoryMiddleware:
    """Give each HTTP request an :class:`AnswerHold` (``scope[HOLD_KEY]``) and release it after the response.

    The hold is released when the app returns, that is once the last piece of the body has been
    handed to the server (:class:`service.api.middleware.BodyChunkMiddleware` sends it in pieces
    of 1 MiB, so at most about one piece is left in the socket's buffer), or when it fails.
    """

    def __init__(self, app: ASGIApp, *, memory: AnswerMemory) -> None:
        self.app = app
        self.memory = memory

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        hold = scope[HOLD_KEY] = AnswerHold(self.memory)
        try:
            await self.app(scope, receive, send)
        finally:
            hold.release()
