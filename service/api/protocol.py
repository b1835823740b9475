"""The HTTP/1.1 connection handling of ``movecast serve``: uvicorn's h11 protocol, guarded.

:class:`GuardedH11Protocol` is uvicorn's own ``H11Protocol`` with five changes:

- **problem details from the server itself.**  What uvicorn answers before the app sees a
  request (a request line or header h11 refuses, e.g. ``Content-Length: abc``) is a 400
  ``application/problem+json``, not uvicorn's plain text;
- **a read deadline.**  A request must arrive whole (request line, headers and body) within
  ``MOVECAST_READ_TIMEOUT_SECONDS`` of its first byte (of the connection, for the first
  request).  A connection that trickles is answered 408 and closed; an idle keep-alive
  connection is closed after ``MOVECAST_KEEP_ALIVE_SECONDS`` (uvicorn's own timer);
- **a stall deadline for responses.**  When the client takes none of a response for
  ``MOVECAST_SEND_STALL_SECONDS`` (the socket's buffer stays full: asyncio paused the writing
  and has not resumed it), the connection is dropped.  A client that reads, however slowly,
  resets it with every drain; one that stops reading cannot keep its answer's bytes in the
  serving process (``service.api.answer_memory``) for longer than that;
- **unambiguous framing.**  A request with both ``Content-Length`` and ``Transfer-Encoding``
  (which h11 reads as chunked, a proxy perhaps by its length) is a 400 and the connection is
  closed (RFC 9112, section 6.3);
- **a connection cap.**  Past ``MOVECAST_MAX_CONNECTIONS`` open connections per worker, a
  new one is answered 503 with ``Retry-After`` and closed at once.

The limits are read from the settings of the environment (:func:`service.api.deps.get_settings`),
the same ones the app of the worker process uses.  ``movecast serve`` installs the class
(:mod:`service.api.serving`); under uvicorn's own command it is named by its import string,
``uvicorn service.api.app:create_app --factory --http service.api.protocol:GuardedH11Protocol``
(uvicorn imports a protocol class named that way).  An ASGI server picks its protocol before it
loads the app, so no app can install it by itself: served any other way, there is no read
deadline and no connection cap (the README says so).
"""

from __future__ import annotations

import asyncio
import json
import logging
from typing import Any

import h11
from uvicorn.protocols.http.h11_impl import H11Protocol

from service.api.deps import get_settings
from service.api.problems import PROBLEM_JSON
from service.pipeline.problems import Problem

__all__ = ["GuardedH11Protocol", "raw_problem"]

log = logging.getLogger("movecast.connections")

_REASONS = {400: "Bad Request", 408: "Request Timeout", 503: "Service Unavailable"}


def raw_problem(status: int, kind: str, detail: str, headers: dict[str, str] | None = None) -> bytes:
    """A whole HTTP/1.1 problem response that closes the connection, as bytes on the wire."""
    body = json.dumps(Problem(kind, status, detail).body("")).encode("utf-8")
    lines = [
        f"HTTP/1.1 {status} {_REASONS.get(status, 'Error')}",
        f"content-type: {PROBLEM_JSON}",
        f"content-length: {len(body)}",
        "connection: close",
        *(f"{name}: {value}" for name, value in (headers or {}).items()),
    ]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + body


class GuardedH11Protocol(H11Protocol):
    """uvicorn's h11 protocol with problem-details 400s, a read deadline and a connection cap."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        settings = get_settings()
        self.read_timeout = settings.read_timeout_seconds
        self.send_stall = settings.send_stall_seconds
        self.max_connections = settings.max_connections
        self._read_deadline: asyncio.TimerHandle | None = None
        self._send_deadline: asyncio.TimerHandle | None = None
        self._h11_next_event = self.conn.next_event
        self.conn.next_event = self._next_event  # type: ignore[method-assign]

    # -- request framing h11 lets through
    def _next_event(self) -> Any:
        """h11's next event; a request framed by both Content-Length and Transfer-Encoding is refused.

        h11 reads such a body as chunked.  A proxy in front may have framed it by its length, so
        the two would disagree on where the next request starts (request smuggling): RFC 9112,
        section 6.3, lets a server reject it and requires the connection to be closed.  Raised
        as h11's own protocol error, it gets uvicorn's handling of one: this class's 400 problem,
        and the connection closed.
        """
        event = self._h11_next_event()
        if isinstance(event, h11.Request):
            names = {name.lower() for name, _ in event.headers}
            if b"content-length" in names and b"transfer-encoding" in names:
                raise h11.RemoteProtocolError("both Content-Length and Transfer-Encoding")
        return event

    # -- the connection cap and the deadline of the first request
    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        if len(self.connections) > self.max_connections:
            log.warning(
                "connection refused: %d open connections (cap %d)", len(self.connections) - 1, self.max_connections
            )
            self._refuse(
                503,
                "too-many-connections",
                f"This server holds its cap of {self.max_connections} open connections; retry shortly.",
                {"Retry-After": "1"},
            )
            return
        self._arm()

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm()
        self._resumed()
        super().connection_lost(exc)

    # -- the stall deadline of responses
    def pause_writing(self) -> None:
        super().pause_writing()
        if self._send_deadline is None:
            self._send_deadline = self.loop.call_later(self.send_stall, self._send_stalled)

    def resume_writing(self) -> None:
        self._resumed()
        super().resume_writing()

    def _resumed(self) -> None:
        if self._send_deadline is not None:
            self._send_deadline.cancel()
            self._send_deadline = None

    def _send_stalled(self) -> None:
        self._send_deadline = None
        if self.transport.is_closing():
            return
        log.warning("the client took none of the response for %g s; connection dropped", self.send_stall)
        self.transport.abort()  # the buffered bytes go at once; uvicorn sees the connection lost

    # -- the read deadline of every request
    def data_received(self, data: bytes) -> None:
        if self._read_deadline is None and (self.cycle is None or self.cycle.response_complete):
            self._arm()  # the first byte of the next request on a kept-alive connection
        super().data_received(data)
        if self.conn.their_state in {h11.DONE, h11.MUST_CLOSE, h11.CLOSED}:
            self._disarm()  # the whole request is in

    def _arm(self) -> None:
        self._disarm()
        self._read_deadline = self.loop.call_later(self.read_timeout, self._read_timed_out)

    def _disarm(self) -> None:
        if self._read_deadline is not None:
            self._read_deadline.cancel()
            self._read_deadline = None

    def _read_timed_out(self) -> None:
        self._read_deadline = None
        if self.transport.is_closing() or self.conn.their_state in {h11.DONE, h11.MUST_CLOSE, h11.CLOSED}:
            return
        if self.conn.their_state is h11.IDLE and not self.conn.trailing_data[0] and self.cycle is not None:
            return  # between requests with nothing received: the keep-alive timer's job
        log.warning("request not received within %g s; connection closed", self.read_timeout)
        self._refuse(
            408,
            "request-timeout",
            f"The request did not arrive whole within {self.read_timeout:g} s; the connection is closed.",
        )

    # -- what uvicorn answers itself
    def send_400_response(self, msg: str) -> None:
        self._refuse(400, "malformed-body", "The request is not valid HTTP/1.1 (request line or headers).")

    def _refuse(self, status: int, kind: str, detail: str, headers: dict[str, str] | None = None) -> None:
        self._disarm()
        if self.transport.is_closing():
            return
        self.transport.write(raw_problem(status, kind, detail, headers))
        self.transport.close()
