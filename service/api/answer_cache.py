"""Answers kept for repeated requests: the same body to the same route gets the same bytes.

Every answer of a compute route is a pure function of the request as sent (the body, the
query string, the ``Accept`` and ``Content-Type`` headers) and of the server's settings and
code: the noise of a simulation is seeded, no answer carries a time or a request id, and no
diagnostic is skipped by elapsed time.  A historian, a gateway or a dashboard that posts the
same design again (a periodic refresh, a review page opened twice) therefore needs no second
computation.  :class:`AnswerCache` keeps the 200 answers of the routes in
:data:`CACHED_ROUTES`, least recently used first out, within ``MOVECAST_ANSWER_CACHE_BYTES``
per serving process (0 turns it off).  A repeated request is answered from the cache before
its body is parsed or validated; authentication, the body limit, request ids, logs and
metrics still apply to it as to any other request.

Not kept: any answer but a 200 (a 503 of a time limit or a full lane depends on the load, not
on the request); ``/design/batch``, whose items can report a time limit inside a 200; an
answer larger than 1/16 of the cache.  Each serving process has its own cache, so replicas
and workers stay independent and a restart empties it.

A client that wants the computation done again says so with the request directives of
RFC 9111 (section 5.2.1): ``Cache-Control: no-cache`` computes afresh and keeps the new
answer, ``Cache-Control: no-store`` computes afresh and keeps nothing.

The answer says what happened in a ``Cache-Status`` header (RFC 9211): ``movecast; hit``
when it came from the cache, ``movecast; fwd=miss; stored`` when it was computed and kept,
``movecast; fwd=miss`` when it was computed and not kept, ``fwd=request`` instead of
``fwd=miss`` when the request's ``Cache-Control`` asked for the computation.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Iterable
from dataclasses import dataclass

from starlette.requests import Request
from starlette.responses import Response

__all__ = [
    "CACHED_ROUTES",
    "CACHE_STATUS",
    "AnswerCache",
    "StoredAnswer",
    "answer_key",
    "keep",
    "request_directives",
    "request_key",
    "stored_response",
]

#: Routes whose 200 answers are kept (their answers depend on the request alone).
CACHED_ROUTES = frozenset({"/design", "/design/sweep", "/design/compare", "/design/export", "/simulate", "/identify"})
#: The response header that tells hit from miss (RFC 9211, "The Cache-Status HTTP Response Header Field").
CACHE_STATUS = "cache-status"
HIT = "movecast; hit"
#: Bytes counted per entry beside its key and its answer (the dictionary slot, the objects).
ENTRY_OVERHEAD_BYTES = 400
#: An answer is kept only if it takes at most this fraction of the cache.
LARGEST_SHARE = 1 / 16


@dataclass(frozen=True)
class StoredAnswer:
    """A 200 answer as it was sent: its body and the headers the route set (content type included)."""

    body: bytes
    headers: tuple[tuple[bytes, bytes], ...]

    @property
    def size(self) -> int:
        """Bytes this entry holds, counted against the cache's capacity."""
        return len(self.body) + sum(len(k) + len(v) for k, v in self.headers) + ENTRY_OVERHEAD_BYTES


def answer_key(route: str, query: bytes, headers: Iterable[tuple[str, str]], body: bytes) -> bytes:
    """SHA-256 digest naming a request by everything its answer depends on.

    Parameters
    ----------
    route : str
        The route's path (``/design``).
    query : bytes
        The raw query string.
    headers : iterable of (str, str)
        The request headers that choose the answer (``accept``, ``content-type``), as given.
    body : bytes
        The body as received.

    Each part is length-prefixed, so no two different requests run together into one text.
    """
    digest = hashlib.sha256()
    for part in (route.encode(), query, *(f"{name}:{value}".encode() for name, value in headers), body):
        digest.update(len(part).to_bytes(8, "little"))
        digest.update(part)
    return digest.digest()


def request_key(request: Request, route: str, body: bytes) -> bytes:
    """:func:`answer_key` of a Starlette request."""
    chosen = (("accept", request.headers.get("accept", "")), ("content-type", request.headers.get("content-type", "")))
    return answer_key(route, request.scope.get("query_string", b""), chosen, body)


class AnswerCache:
    """At most ``capacity`` bytes of answers, least recently used out first.

    Parameters
    ----------
    capacity : int
        Bytes of answers (and their keys and headers) kept; 0 keeps none.

    Safe to share between threads (one lock around each look-up and store).
    """

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self.held = 0
        self._entries: OrderedDict[bytes, StoredAnswer] = OrderedDict()
        self._lock = threading.Lock()

    def __len__(self) -> int:
        return len(self._entries)

    @property
    def enabled(self) -> bool:
        """Whether anything can be kept."""
        return self.capacity > 0

    def get(self, key: bytes) -> StoredAnswer | None:
        """The answer kept under ``key`` (now the most recently used), or None."""
        with self._lock:
            answer = self._entries.get(key)
            if answer is not None:
                self._entries.move_to_end(key)
            return answer

    def put(self, key: bytes, answer: StoredAnswer) -> bool:
        """Keep ``answer`` under ``key``, dropping the least recently used to make room.

        Returns whether it was kept (an answer above ``LARGEST_SHARE`` of the capacity is not).
        """
        size = answer.size + len(key)
        if size > self.capacity * LARGEST_SHARE:
            return False
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self.held -= old.size + len(key)
            while self._entries and self.held + size > self.capacity:
                dropped_key, dropped = self._entries.popitem(last=False)
                self.held -= dropped.size + len(dropped_key)
            self._entries[key] = answer
            self.held += size
            return True

    def clear(self) -> None:
        """Forget every answer."""
        with self._lock:
            self._entries.clear()
            self.held = 0


def stored_response(answer: StoredAnswer) -> Response:
    """The kept answer as a fresh response, marked as a hit."""
    response = Response(answer.body)
    response.raw_headers = [*answer.headers, (CACHE_STATUS.encode(), HIT.encode())]
    return response


def request_directives(request: Request) -> frozenset[str]:
    """The directive names of the request's ``Cache-Control`` header, in lower case (RFC 9111, 5.2)."""
    header = request.headers.get("cache-control")
    if not header:
        return frozenset()
    return frozenset(part.split("=", 1)[0].strip().lower() for part in header.split(","))


def keep(cache: AnswerCache, key: bytes, response: Response, *, store: bool = True, asked: bool = False) -> Response:
    """Keep a 200 answer that carries its whole body (unless ``store`` is false); say so in ``Cache-Status``.

    ``asked``: the request's ``Cache-Control`` asked for the computation (``fwd=request``).
    """
    body = getattr(response, "body", None)
    kept = False
    if store and response.status_code == 200 and isinstance(body, bytes | memoryview):
        headers = tuple((k, v) for k, v in response.raw_headers if k.lower() != CACHE_STATUS.encode())
        kept = cache.put(key, StoredAnswer(bytes(body), headers))
    status = f"movecast; fwd={'request' if asked else 'miss'}" + ("; stored" if kept else "")
    response.raw_headers.append((CACHE_STATUS.encode(), status.encode()))
    return response
