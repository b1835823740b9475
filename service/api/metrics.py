"""Prometheus metrics (prometheus-client) and the GET /metrics endpoint.

Requests are labelled by route template (``/design``, never a raw path; ``<unmatched>`` for
every unknown one), method (``other`` for every non-standard one) and status, so the label
sets are fixed and small whatever callers send.  With several worker processes, set ``PROMETHEUS_MULTIPROC_DIR``
to an empty writable folder before start-up (``movecast serve`` does it for you when
``MOVECAST_WORKERS`` > 1): every process then writes its samples there and /metrics adds
them up (prometheus-client's multiprocess mode).

/metrics needs the API key when keys are configured (it reveals traffic); give the scraper
the key (Prometheus: ``authorization: {credentials_file: ...}`` in the scrape config).
"""

from __future__ import annotations

import os

from fastapi import APIRouter
from fastapi.responses import Response
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
    multiprocess,
)

from service.schemas.design import DesignResponse

__all__ = [
    "ANSWER_CACHE",
    "ANSWER_MEMORY",
    "DESIGN_SIZE",
    "IN_PROGRESS",
    "LANE_REQUESTS",
    "REJECTED",
    "REJECTION_REASONS",
    "REQUESTS",
    "REQUEST_SECONDS",
    "SOLVER_SECONDS",
    "count_rejection",
    "observe_design",
    "observe_design_sizes",
    "router",
]

_LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60)
_SIZE_BUCKETS = (1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000)

REQUESTS = Counter("movecast_requests", "HTTP requests answered.", ["method", "route", "status"])
REQUEST_SECONDS = Histogram(
    "movecast_request_duration_seconds",
    "Time from request to the end of the response.",
    ["method", "route", "status"],
    buckets=_LATENCY_BUCKETS,
)
IN_PROGRESS = Gauge(
    "movecast_requests_in_progress",
    "Requests received and not yet answered.",
    ["route"],
    multiprocess_mode="livesum",
)
ANSWER_MEMORY = Gauge(
    "movecast_answer_memory_bytes",
    "Bytes of answers the serving process holds for requests in flight (estimated from their sizes, "
    "from the solver's reply to the last byte sent; at most MOVECAST_MAX_ANSWER_MEMORY_BYTES).",
    multiprocess_mode="livesum",
)
SOLVER_SECONDS = Histogram(
    "movecast_solver_duration_seconds",
    "Time spent in the solver process per call.",
    ["operation"],
    buckets=_LATENCY_BUCKETS,
)
LANE_REQUESTS = Counter(
    "movecast_solver_lane_calls_total",
    "Solver calls per lane (light or heavy, by the work estimated from the request's sizes).",
    ["lane"],
)
ANSWER_CACHE = Counter(
    "movecast_answer_cache_lookups",
    "Requests of the cached routes, by outcome: hit (answered from the answer cache) or miss (computed).",
    ["route", "outcome"],
)
DESIGN_SIZE = Histogram(
    "movecast_design_size",
    "Sizes of the designs computed (a repeat answered from the answer cache is not counted again): "
    "states n, inputs m, outputs p, Hessian dimension Hu*m.",
    ["dimension"],
    buckets=_SIZE_BUCKETS,
)
REJECTED = Counter(
    "movecast_rejected_requests",
    "Requests (or batch items) refused, by reason.",
    ["reason"],
)

#: Problem kind (the end of the problem ``type``) -> rejection reason.
REJECTION_REASONS = {
    "invalid-request": "validation",
    "malformed-body": "validation",
    "numerical-problem": "numerical",
    "payload-too-large": "too_large",
    "unauthorized": "unauthorized",
    "time-limit": "timeout",
}


def count_rejection(kind: str) -> None:
    """Count one refusal of the problem kind ``kind`` (kinds without a reason are ignored)."""
    reason = REJECTION_REASONS.get(kind)
    if reason is not None:
        REJECTED.labels(reason=reason).inc()


def observe_design(response: DesignResponse) -> None:
    """Record the sizes of one answered design, read from its gains (any model form)."""
    state, setpoint = response.gain.state, response.gain.setpoint
    observe_design_sizes(
        {
            "states": len(state[0]) if state else 0,
            "inputs": len(state),
            "outputs": len(setpoint[0]) if setpoint else 0,
            "hessian": response.hessian.size,
        }
    )


def observe_design_sizes(sizes: dict[str, int]) -> None:
    """Record the sizes of one answered design (``states``, ``inputs``, ``outputs``, ``hessian``)."""
    for dimension, value in sizes.items():
        DESIGN_SIZE.labels(dimension=dimension).observe(value)


def _exposition() -> bytes:
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry)  # type: ignore[no-untyped-call]
        return generate_latest(registry)
    return generate_latest(REGISTRY)


router = APIRouter(tags=["operations"])


@router.get("/metrics", include_in_schema=False)
async def metrics() -> Response:
    """Prometheus metrics in the text exposition format (on the event loop: no compute pool)."""
    return Response(_exposition(), media_type=CONTENT_TYPE_LATEST)
