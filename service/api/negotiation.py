"""Content negotiation of the routes that answer JSON or one other type (CSV, Markdown).

One rule for every such route, from the ``Accept`` header (RFC 9110, section 12.5.1): each
type takes the quality of the most specific media range that matches it (``text/csv``, then
``text/*``, then ``*/*``); the other type wins only with a higher quality, or with the same
quality and a more specific match.  JSON is the answer by default and on a tie.
"""

from __future__ import annotations

__all__ = ["prefers"]

JSON = "application/json"


def _group(media: str) -> str:
    return media.split("/", 1)[0] + "/*"


def _ranges(accept: str) -> list[tuple[str, float]]:
    """The media ranges of an ``Accept`` header with their qualities (0 for a malformed ``q``)."""
    found = []
    for part in accept.split(","):
        media, *params = (item.strip() for item in part.split(";"))
        quality = 1.0
        for param in params:
            key, _, value = param.partition("=")
            if key.strip().lower() == "q":
                try:
                    quality = float(value)
                except ValueError:
                    quality = 0.0
                if not 0.0 <= quality <= 1.0:
                    quality = 0.0
        found.append((media.lower(), quality))
    return found


def _match(ranges: list[tuple[str, float]], media: str) -> tuple[float, int]:
    """The quality of ``media`` and how specific its best range was (2 exact, 1 group, 0 any, -1 none)."""
    best = (0.0, -1)
    for given, quality in ranges:
        specific = 2 if given == media else 1 if given == _group(media) else 0 if given == "*/*" else -1
        if specific > best[1]:
            best = (quality, specific)
    return best


def prefers(accept: str | None, media: str) -> bool:
    """Whether an ``Accept`` header asks for ``media`` rather than JSON (JSON on a tie or by default)."""
    if not accept:
        return False
    ranges = _ranges(accept)
    (q_other, s_other), (q_json, s_json) = _match(ranges, media), _match(ranges, JSON)
    return q_other > 0.0 and (q_other > q_json or (q_other == q_json and s_other > s_json))
