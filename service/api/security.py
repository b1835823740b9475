"""Optional API-key authentication: ``Authorization: Bearer <key>``.

With no key configured (``MOVECAST_API_KEYS`` and ``MOVECAST_API_KEYS_FILE`` both empty) the
service is open and says so in a warning at start-up.  With keys, every path needs one except
:data:`OPEN_PATHS`: the health endpoints (probes carry no credentials) and the OpenAPI
document and its pages (the contract is public; it is committed with the code), and the
browser workbench (``/`` and :data:`OPEN_PREFIXES`: static files and the bundled examples,
no data; the page sends a key with every API call it makes).  /metrics is protected like the
API.  Paths are compared without the ASGI ``root_path`` (a reverse proxy's prefix).

Keys are compared in constant time: the SHA-256 digest of the presented key against the
digest of every configured key with :func:`hmac.compare_digest`, all keys every time, so the
time taken tells neither which key nor how much of one matched.  A refusal is a 401 problem
with ``WWW-Authenticate: Bearer`` (RFC 6750, section 3).
"""

from __future__ import annotations

import hashlib
import hmac
from collections.abc import Iterable

from starlette.datastructures import Headers
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.problems import problem_response

__all__ = ["OPEN_PATHS", "OPEN_PREFIXES", "ApiKeyMiddleware", "KeyRing", "is_open_path", "route_path"]

OPEN_PATHS = frozenset({"/healthz", "/readyz", "/openapi.json", "/docs", "/docs/oauth2-redirect", "/redoc", "/"})
#: Path prefixes open to anyone: the workbench's static files and bundled examples.
OPEN_PREFIXES = ("/workbench/",)
REALM = 'Bearer realm="movecast"'


def route_path(scope: Scope) -> str:
    """The request path without the ``root_path`` prefix a server or proxy put in front."""
    path: str = scope.get("path", "")
    root: str = scope.get("root_path", "")
    if not root or not path.startswith(root):
        return path
    if path == root:
        return "/"
    return path[len(root) :] if path[len(root)] == "/" else path


def is_open_path(path: str) -> bool:
    """Whether ``path`` (without the root path) needs no API key."""
    return path in OPEN_PATHS or (path.startswith(OPEN_PREFIXES) and ".." not in path)


class KeyRing:
    """The accepted keys, kept only as SHA-256 digests."""

    def __init__(self, keys: Iterable[str]) -> None:
        self._digests = tuple(hashlib.sha256(k.encode("utf-8")).digest() for k in keys)

    def __bool__(self) -> bool:
        return bool(self._digests)

    def accepts(self, key: str) -> bool:
        """True when ``key`` is one of the keys; compares against all of them."""
        presented = hashlib.sha256(key.encode("utf-8", "surrogateescape")).digest()
        found = False
        for digest in self._digests:
            found |= hmac.compare_digest(presented, digest)
        return found


def bearer_token(authorization: str | None) -> str | None:
    """The token of an ``Authorization: Bearer <token>`` header (scheme case-insensitive)."""
    if not authorization:
        return None
    scheme, _, token = authorization.strip().partition(" ")
    token = token.strip()
    if scheme.lower() != "bearer" or not token:
        return None
    return token


class ApiKeyMiddleware:
    """Answer 401 to a request outside :data:`OPEN_PATHS` without an accepted key."""

    def __init__(self, app: ASGIApp, *, keys: KeyRing) -> None:
        self.app = app
        self.keys = keys

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or is_open_path(route_path(scope)):
            await self.app(scope, receive, send)
            return
        header = Headers(scope=scope).get("authorization")
        token = bearer_token(header)
        if token is not None and self.keys.accepts(token):
            await self.app(scope, receive, send)
            return
        if token is None:
            detail = "This service needs an API key: send the header 'Authorization: Bearer <key>'."
            challenge = REALM
        else:
            detail = "The API key is not accepted."
            challenge = f'{REALM}, error="invalid_token"'
        response = problem_response(
            "unauthorized", 401, detail, scope.get("path", ""), headers={"WWW-Authenticate": challenge}
        )
        await response(scope, receive, send)
