"""Structured logs: one JSON object per line, each carrying the request id.

The request id lives in a context variable set by the request middleware; FastAPI copies the
context into the thread that runs a handler, so every line logged while answering a request
carries its id.  :func:`logging_config` is a :func:`logging.config.dictConfig` dictionary for
``movecast serve`` (uvicorn's own access log is switched off there: the service writes one
line per request itself, logger ``movecast.access``).
"""

from __future__ import annotations

import contextvars
import json
import logging
import time
import warnings
from typing import Any, TextIO

__all__ = ["JsonFormatter", "RequestIdFilter", "log_warnings", "logging_config", "request_id_var"]

#: The id of the request being answered ("" outside a request).
request_id_var: contextvars.ContextVar[str] = contextvars.ContextVar("movecast_request_id", default="")

#: Attributes every LogRecord has; anything else given through ``extra=`` is written out.
_STANDARD = set(vars(logging.makeLogRecord({}))) | {"message", "asctime", "request_id", "taskName", "color_message"}


class RequestIdFilter(logging.Filter):
    """Add ``request_id`` to every record (from the context unless the record has one)."""

    def filter(self, record: logging.LogRecord) -> bool:
        if not getattr(record, "request_id", ""):
            record.request_id = request_id_var.get()
        return True


class JsonFormatter(logging.Formatter):
    """Format a record as one JSON line: time, level, logger, message, request id, extras.

    Exceptions go into ``exception`` as text: logs may hold tracebacks, responses never do.
    """

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
            "request_id": getattr(record, "request_id", "") or request_id_var.get(),
        }
        for key, value in vars(record).items():
            if key not in _STANDARD and not key.startswith("_"):
                entry[key] = value
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry, default=str, ensure_ascii=False)


def logging_config(level: str) -> dict[str, Any]:
    """A dictConfig for the service and uvicorn: JSON lines on standard error at ``level``."""
    upper = level.upper()
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "filters": {"request_id": {"()": RequestIdFilter}},
        "formatters": {"json": {"()": JsonFormatter}},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "stream": "ext://sys.stderr",
                "formatter": "json",
                "filters": ["request_id"],
            }
        },
        "loggers": {
            "movecast": {"level": upper},
            "uvicorn": {"level": upper},
            "uvicorn.error": {"level": upper},
            "uvicorn.access": {"level": "WARNING", "propagate": False, "handlers": []},
        },
        "root": {"level": upper, "handlers": ["stderr"]},
    }


def _show_warning(
    message: Warning | str,
    category: type[Warning],
    filename: str,
    lineno: int,
    file: TextIO | None = None,
    line: str | None = None,
) -> None:
    logging.getLogger("movecast.warnings").warning(
        "%s: %s", category.__name__, message, extra={"category": category.__name__}
    )


def log_warnings() -> None:
    """Send Python warnings (numpy's RuntimeWarning and the like) to the JSON log.

    One ``movecast.warnings`` line per warning with its category and message, never the raw
    ``file:line: ...`` text with source paths that Python writes to standard error.  Warnings
    raised inside solver calls travel back with their outcome and are logged by
    ``movecast.solver`` the same way.
    """
    warnings.showwarning = _show_warning
