"""Request bodies of the compute routes: strict JSON, parsed and validated off the event loop.

:class:`CheckedBodyRoute` is the route class of every router whose handler takes a JSON body.
Before FastAPI sees the request it

1. refuses any content type but ``application/json`` (or ``application/*+json``, charset
   UTF-8 when given) with 415, a body-less request with 422 at pointer ``""``;
2. reads the body (the body limit has already counted it), decodes it as UTF-8, parses it
   strictly (:func:`parse_json`: pydantic-core's parser where it gives the strict value, the
   standard ``json`` module with strict hooks where it must decide) and validates it with the
   route's request model: on the
   event loop when the body is at most :data:`INLINE_BODY_BYTES` (a fraction of a millisecond;
   the trip to a thread would cost more), otherwise in a worker thread of its own small pool
   (never the compute threads), so that a big body never blocks the event loop;
3. hands FastAPI the validated model, which it accepts as it is.

On the routes of :data:`service.api.answer_cache.CACHED_ROUTES` a request that repeats an
earlier one byte for byte is answered from the serving process's answer cache before any of
this (:mod:`service.api.answer_cache`).

A route class made by :func:`csv_body_route` also takes a ``text/csv`` body (charset UTF-8
when given): its reader turns the CSV and the query parameters into the same request model,
in the same worker pool, and the handler receives it as if it had come as JSON.  A JSON body
on such a route takes no query parameters (422 naming each one), so a choice is never
silently ignored.

Problems come back as :class:`~service.errors.MalformedBody` (400),
:class:`~service.errors.UnsupportedMediaType` (415, also for a compressed body: any
``Content-Encoding`` but ``identity``) or
:class:`~service.errors.InvalidRequest` (422, one entry per field, pointers into the body).
A huge list of bad entries costs little: matrices and vectors stop at their first bad entry
(``fail_fast``), and a problem lists at most
:data:`~service.pipeline.problems.MAX_REPORTED_ERRORS` fields with the count of the rest.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Coroutine, Mapping
from typing import Any, ClassVar

import anyio
import pydantic_core
from fastapi import Request, Response
from fastapi.routing import APIRoute
from pydantic import BaseModel, ValidationError

from service.api.answer_cache import (
    CACHED_ROUTES,
    AnswerCache,
    keep,
    request_directives,
    request_key,
    stored_response,
)
from service.api.direct import direct_call
from service.api.metrics import ANSWER_CACHE
from service.errors import FieldProblem, InvalidRequest, MalformedBody, UnsupportedMediaType
from service.pipeline.problems import pointer, validation_problems

__all__ = ["CheckedBodyRoute", "CsvReader", "csv_body_route", "csv_content_type", "parse_and_validate", "parse_json"]

#: Reads a ``text/csv`` body and its query parameters (each given once) into the route's request
#: model; raises ``InvalidRequest`` naming the cell or the parameter.  Runs in a worker thread.
CsvReader = Callable[[bytes, Mapping[str, str]], BaseModel]

#: Digits beyond which a JSON integer is read as a float (no field takes so large an integer;
#: Python refuses to convert integers of more than 4300 digits at all).
MAX_INTEGER_DIGITS = 30
#: Threads that parse and validate bodies at once (their own pool: compute never waits on them).
PARSE_THREADS = 2
#: Bodies up to this size are parsed and validated on the event loop (a request of the
#: bundled examples is 1-5 KB and takes about 0.1 ms); larger ones in the parse threads.
INLINE_BODY_BYTES = 16 * 1024
_parse_limiter: anyio.CapacityLimiter | None = None


class _Members(dict[str, Any]):
    """A JSON object whose text repeated a member name (the names are kept for the report)."""

    repeated: tuple[str, ...] = ()


def _object(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result = dict(pairs)
    if len(result) == len(pairs):
        return result
    seen: set[str] = set()
    repeated = []
    for key, _ in pairs:
        if key in seen and key not in repeated:
            repeated.append(key)
        seen.add(key)
    flagged = _Members(result)
    flagged.repeated = tuple(repeated)
    return flagged


def _integer(text: str) -> int | float:
    if len(text.lstrip("-")) > MAX_INTEGER_DIGITS:
        return float(text)  # inf beyond 1e308: refused as "finite number" at the field
    return int(text)


def _repeated_members(value: Any) -> list[FieldProblem]:
    """Every object of the parsed body that repeated a member name, by pointer."""
    found: list[FieldProblem] = []
    stack: list[tuple[Any, tuple[str | int, ...]]] = [(value, ())]
    while stack:
        item, where = stack.pop()
        if isinstance(item, dict):
            if isinstance(item, _Members):
                found.extend(
                    FieldProblem(pointer(*where, key), "this member appears more than once in its object; send it once")
                    for key in item.repeated
                )
            stack.extend((v, (*where, k)) for k, v in item.items() if isinstance(v, (dict, list)))
        elif isinstance(item, list):
            stack.extend((v, (*where, i)) for i, v in enumerate(item) if isinstance(v, (dict, list)))
    return sorted(found, key=lambda p: p.pointer)


#: Integers at or past this size are read as floats by the strict parser (:func:`_integer`).
_LARGE_INTEGER = 10**MAX_INTEGER_DIGITS
#: Types of a JSON value that hold nothing to check further.
_PLAIN_SCALARS = frozenset({float, bool, type(None)})


def _parsed_plainly(body: bytes) -> Any | None:
    """The body parsed by pydantic-core's JSON parser when that gives the strict parser's value.

    Returns ``None`` whenever the strict route (``json.loads`` with its hooks) must decide:
    the parser refused the text (so the strict route words the 400), the value is not an
    object or array, an integer has more than :data:`MAX_INTEGER_DIGITS` digits (the strict route
    reads it as a float), a string holds a colon, or an object repeated a member name.

    Notes
    -----
    pydantic-core keeps the last of repeated members, so repeats are found by counting: in
    JSON text a colon outside a string separates exactly one member from its value, and a
    colon inside a string stays a colon when the string is decoded.  When no decoded string
    holds a colon, the colons of the raw text are therefore the members the text wrote, and
    the parsed objects hold fewer exactly when a name was repeated.  The numbers are the
    same: both parsers round each decimal to the nearest double (checked against ``float``
    on random doubles in tests/api/test_body_parsing.py).  On a 1 MB design of the
    large benchmark case this route takes about 4 ms against 15 ms for ``json.loads``.
    """
    try:
        value = pydantic_core.from_json(body)
    except ValueError:
        return None
    if type(value) is not dict and type(value) is not list:
        return None
    members = 0
    stack: list[Any] = [value]
    while stack:
        item = stack.pop()
        if type(item) is dict:
            members += len(item)
            entries: list[Any] = [*item, *item.values()]
        else:
            entries = item
        if set(map(type, entries)) <= _PLAIN_SCALARS:
            continue  # a row of numbers: nothing inside to check
        for entry in entries:
            kind = type(entry)
            if kind is dict or kind is list:
                stack.append(entry)
            elif kind is str:
                if ":" in entry:
                    return None
            elif kind is int and not -_LARGE_INTEGER < entry < _LARGE_INTEGER:
                return None
    if body.count(b":") != members:
        return None  # a repeated member name: the strict route names it
    return value


def parse_json(body: bytes) -> Any:
    """Parse a request body as strict JSON (RFC 8259 in UTF-8, I-JSON's unique member names).

    Raises
    ------
    MalformedBody
        400: not UTF-8, not JSON, nesting too deep for the parser.  (``NaN`` and
        ``Infinity`` parse, so that the field refusing them is named by pointer.)
    InvalidRequest
        422: a member name repeated in one object (each one named by pointer).
    """
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise MalformedBody(f"The request body is not valid UTF-8 (byte {exc.start}).") from None
    fast = _parsed_plainly(body)
    if fast is not None:
        return fast
    repeated = False

    def members(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        nonlocal repeated
        result = _object(pairs)
        repeated = repeated or isinstance(result, _Members)
        return result

    try:
        value = json.loads(text, object_pairs_hook=members, parse_int=_integer)
    except json.JSONDecodeError as exc:
        raise MalformedBody(
            f"The request body is not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}.",
        ) from None
    except RecursionError:
        raise MalformedBody("The request body is nested too deeply to be a request.") from None
    except ValueError as exc:
        raise MalformedBody(f"The request body is not valid JSON: {exc}.") from None
    if repeated:
        raise InvalidRequest(_repeated_members(value))
    return value


def parse_and_validate(body: bytes, model: type[BaseModel]) -> BaseModel:
    """Parse ``body`` (:func:`parse_json`) and validate it as ``model``; meant for a worker thread.

    Raises
    ------
    MalformedBody, InvalidRequest
    """
    value = parse_json(body)
    try:
        return model.model_validate(value)
    except ValidationError as exc:
        errors = exc.errors(include_url=False, include_input=False)
        raise InvalidRequest(validation_problems(errors)) from None
    except RecursionError:
        raise MalformedBody("The request body is nested too deeply to be a request.") from None


def _utf8_media(value: str | None) -> str | None:
    """The media type of a ``Content-Type`` (lower case), or None when absent or not in UTF-8."""
    if not value:
        return None
    media, *params = (part.strip() for part in value.split(";"))
    for param in params:
        key, _, given = param.partition("=")
        if key.strip().lower() == "charset" and given.strip().strip('"').lower() not in {"utf-8", "utf8"}:
            return None
    return media.lower()


def json_content_type(value: str | None) -> bool:
    """Whether a ``Content-Type`` names JSON in UTF-8 (``application/json``, ``application/*+json``)."""
    media = _utf8_media(value)
    return media is not None and (
        media == "application/json" or (media.startswith("application/") and media.endswith("+json"))
    )


def csv_content_type(value: str | None) -> bool:
    """Whether a ``Content-Type`` names CSV (``text/csv``, RFC 4180) in UTF-8."""
    return _utf8_media(value) == "text/csv"


def _limiter() -> anyio.CapacityLimiter:
    global _parse_limiter
    if _parse_limiter is None:
        _parse_limiter = anyio.CapacityLimiter(PARSE_THREADS)
    return _parse_limiter


def _once(query: Any) -> dict[str, str]:
    """The query parameters as a mapping; one given more than once is a 422 naming it."""
    items = list(query.multi_items())
    names = [name for name, _ in items]
    repeated = sorted({name for name in names if names.count(name) > 1})
    if repeated:
        raise InvalidRequest(
            [FieldProblem(pointer(name), "this query parameter is given more than once") for name in repeated]
        )
    return dict(items)


def _as_json(request: Request, body: bytes, model: BaseModel) -> Request:
    """The same request as FastAPI reads a JSON one: content type JSON, its validated model as the JSON."""
    scope = dict(request.scope)
    scope["headers"] = [
        *((k, v) for k, v in request.scope["headers"] if k.lower() != b"content-type"),
        (b"content-type", b"application/json"),
    ]
    forwarded = Request(scope, request.receive)
    forwarded._body = body
    forwarded._json = model
    return forwarded


class CheckedBodyRoute(APIRoute):
    """A route whose JSON body is checked by :func:`parse_and_validate` before FastAPI sees it.

    Small bodies are checked on the event loop, larger ones in a worker thread.  When
    :func:`service.api.direct.direct_call` can provide the endpoint's dependencies, the
    endpoint is then called directly; otherwise FastAPI's handler resolves them.
    """

    #: The reader of ``text/csv`` bodies (:func:`csv_body_route`); None: JSON only.
    csv_reader: ClassVar[CsvReader | None] = None

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()
        body_field = self.body_field
        if body_field is None:
            return handler
        model = body_field.field_info.annotation
        if not (isinstance(model, type) and issubclass(model, BaseModel)):
            return handler

        reader = type(self).csv_reader
        route = self.path if self.path in CACHED_ROUTES else None
        direct = direct_call(self)  # None: FastAPI resolves the dependencies

        async def checked(request: Request) -> Response:
            cache: AnswerCache | None = getattr(request.app.state, "answer_cache", None)
            if route is None or cache is None or not cache.enabled:
                return await unchecked(request)
            directives = request_directives(request)
            if "no-store" in directives:  # computed, and kept nowhere
                ANSWER_CACHE.labels(route=route, outcome="miss").inc()
                return keep(cache, b"", await unchecked(request), store=False, asked=True)
            body = await request.body()
            if len(body) <= INLINE_BODY_BYTES:
                key = request_key(request, route, body)
            else:  # hashing a megabyte takes a millisecond or two: not on the event loop
                key = await anyio.to_thread.run_sync(request_key, request, route, body, limiter=_limiter())
            asked = "no-cache" in directives
            answer = None if asked else cache.get(key)
            ANSWER_CACHE.labels(route=route, outcome="miss" if answer is None else "hit").inc()
            if answer is not None:
                return stored_response(answer)
            return keep(cache, key, await unchecked(request), asked=asked)

        async def unchecked(request: Request) -> Response:
            encoding = request.headers.get("content-encoding", "").strip().lower()
            if encoding not in ("", "identity"):  # read as it is, a compressed body is no JSON
                raise UnsupportedMediaType(
                    f"The request body is sent with 'Content-Encoding: {encoding[:40]}'; this service reads "
                    "bodies uncompressed only: send it without a Content-Encoding.",
                    encoding=True,
                )
            content_type = request.headers.get("content-type")
            if reader is not None and csv_content_type(content_type):
                query = _once(request.query_params)
                body = await request.body()
                read = await anyio.to_thread.run_sync(reader, body, query, limiter=_limiter())
                return await handler(_as_json(request, body, read))
            if not json_content_type(content_type):
                also = " or as CSV with 'Content-Type: text/csv'" if reader is not None else ""
                raise UnsupportedMediaType(
                    f"Send the request body as JSON with 'Content-Type: application/json'{also}.",
                    accepted="application/json, text/csv" if reader is not None else "application/json",
                )
            if reader is not None and request.query_params:
                raise InvalidRequest(
                    [
                        FieldProblem(
                            pointer(name),
                            "query parameters go with a text/csv body only; with JSON, give the choice in the body",
                        )
                        for name in sorted(set(request.query_params.keys()))
                    ]
                )
            body = await request.body()
            if not body.strip():
                raise InvalidRequest([FieldProblem("", "the request body is required: a JSON object")])
            if len(body) <= INLINE_BODY_BYTES:
                request._json = parse_and_validate(body, model)
            else:
                request._json = await anyio.to_thread.run_sync(parse_and_validate, body, model, limiter=_limiter())
            if direct is not None and not request.app.dependency_overrides:
                return await direct(request, request._json)
            return await handler(request)

        return checked


def csv_body_route(reader: CsvReader) -> type[CheckedBodyRoute]:
    """A :class:`CheckedBodyRoute` that also takes ``text/csv`` bodies, read by ``reader``."""
    return type("CsvOrJsonBodyRoute", (CheckedBodyRoute,), {"csv_reader": staticmethod(reader)})
