"""Parsing and checks behind the production settings (keys, origins, log level).

Each function raises ``ValueError`` with a sentence an operator understands; pydantic turns
it into a validation error that names the ``MOVECAST_*`` variable, so a bad setting stops the
service at start-up instead of surfacing on the first request.
"""

from __future__ import annotations

import difflib
import ipaddress
import json
import re
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

__all__ = [
    "LOG_LEVELS",
    "MIN_KEY_LENGTH",
    "check_host",
    "check_keys",
    "check_log_level",
    "check_origins",
    "read_key_file",
    "split_list",
    "unknown_variables",
]

#: Log levels of the standard logging module that the service accepts, lower case.
LOG_LEVELS = ("critical", "error", "warning", "info", "debug")

#: Shortest API key accepted: a shorter one is guessable (common practice: 128 bits of
#: randomness, e.g. ``secrets.token_urlsafe(16)`` is 22 characters).
MIN_KEY_LENGTH = 16

#: A host name label (RFC 1123, section 2.1): letters, digits and hyphens, no hyphen at either end.
_LABEL = re.compile(r"[A-Za-z0-9]([A-Za-z0-9-]{0,61}[A-Za-z0-9])?")
_ORIGIN = re.compile(r"https?://[A-Za-z0-9.-]+(:[0-9]{1,5})?")


def split_list(value: Any) -> Any:
    """Split a comma-separated string into stripped, non-empty parts.

    A string starting with ``[`` is read as a JSON array instead, so both
    ``a,b`` and ``["a", "b"]`` work in an environment variable.  Anything that is not a
    string is returned as given (pydantic checks it).
    """
    if not isinstance(value, str):
        return value
    text = value.strip()
    if text.startswith("["):
        try:
            parsed = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ValueError(f"not a JSON array of strings: {exc.msg}") from None
        if not isinstance(parsed, list) or not all(isinstance(p, str) for p in parsed):
            raise ValueError("not a JSON array of strings")
        return [p.strip() for p in parsed if p.strip()]
    return [part.strip() for part in text.split(",") if part.strip()]


def check_keys(keys: Iterable[str], *, source: str) -> list[str]:
    """Check API keys are long enough and hold no whitespace or comma."""
    checked = []
    for number, key in enumerate(keys, start=1):
        if len(key) < MIN_KEY_LENGTH:
            raise ValueError(
                f"key {number} from {source} has {len(key)} characters; use at least {MIN_KEY_LENGTH} random characters"
            )
        if any(ch.isspace() or ch == "," for ch in key) or not key.isprintable():
            raise ValueError(f"key {number} from {source} holds whitespace, a comma or a control character")
        checked.append(key)
    return checked


def read_key_file(path: Path) -> list[str]:
    """Read one API key per line; blank lines and lines starting with ``#`` are skipped."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ValueError(f"cannot read the API key file: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise ValueError("the API key file is not UTF-8 text") from None
    keys = [line.strip() for line in text.splitlines()]
    keys = [key for key in keys if key and not key.startswith("#")]
    if not keys:
        raise ValueError("the API key file holds no key (one key per line)")
    return check_keys(keys, source="the API key file")


def check_origins(origins: Iterable[str]) -> list[str]:
    """Check CORS origins are ``*`` or ``scheme://host[:port]`` with no path."""
    checked = []
    for origin in origins:
        if origin != "*" and not _ORIGIN.fullmatch(origin):
            raise ValueError(
                f"{origin!r} is not an origin; write it as scheme://host[:port] with no path, "
                "e.g. https://dashboard.example.com"
            )
        checked.append(origin)
    return checked


def check_log_level(value: Any) -> Any:
    """Lower-case a log level name and check it is one of :data:`LOG_LEVELS`."""
    if isinstance(value, str):
        level = value.strip().lower()
        if level not in LOG_LEVELS:
            raise ValueError(f"{value!r} is not a log level; use one of {', '.join(LOG_LEVELS)}")
        return level
    return value


def check_host(value: str) -> str:
    """Check the address to listen on is an IP address or a host name (nothing else binds).

    An empty address is refused: uvicorn would listen on every interface with it, which is
    0.0.0.0 said out loud, never an accident.
    """
    if not value.strip():
        raise ValueError(
            "empty; give an address to listen on, e.g. 127.0.0.1 (this host only) or 0.0.0.0 (every interface)"
        )
    try:
        ipaddress.ip_address(value)
    except ValueError:
        labels = value.removesuffix(".").split(".")
        if len(value) > 253 or not all(_LABEL.fullmatch(label) for label in labels):
            raise ValueError(
                f"{value!r} is neither an IP address nor a host name; e.g. 127.0.0.1, 0.0.0.0, :: or localhost"
            ) from None
    return value


def unknown_variables(environ: Mapping[str, str], known: Iterable[str], prefix: str = "MOVECAST_") -> list[str]:
    """A sentence for each variable of ``prefix`` that is no setting, naming the setting it resembles.

    pydantic-settings reads only the variables of its fields, so a misspelt one is ignored in
    silence; the service then runs on the default the operator meant to change.
    """
    names = sorted(set(known))
    found = []
    for name in sorted(environ):
        if not name.startswith(prefix) or name in names:
            continue
        near = difflib.get_close_matches(name, names, n=1, cutoff=0.8)
        hint = f"; did you mean {near[0]}?" if near else "; see the README for the settings"
        found.append(f"{name} is not a setting and is ignored{hint}")
    return found
