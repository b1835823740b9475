"""POST /simulate: a closed-loop preview of the design with an estimator, as JSON or CSV."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Request
from fastapi.responses import Response

from service.api.bodies import CheckedBodyRoute
from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.negotiation import prefers
from service.api.problems import PROBLEM_JSON
from service.pipeline.examples import load_example
from service.pipeline.simulate import run_simulation_answer
from service.schemas.simulate import SimulateRequest, SimulateResponse

__all__ = ["CSV", "prefers_csv", "router"]

router = APIRouter(tags=["simulate"], route_class=CheckedBodyRoute)

CSV = "text/csv"

RESPONSES: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "The run: time series, figures of merit, estimator, whole-loop poles and the design. "
        "With `Accept: text/csv`, the time series alone as CSV (time, outputs, setpoints, inputs).",
        "content": {CSV: {"schema": {"type": "string"}}},
    },
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "A field is invalid, the run is too large, or the design or estimator cannot be "
        "formed; `errors` names each field by JSON pointer.",
        "content": {PROBLEM_JSON: {}},
    },
}


def prefers_csv(accept: str | None) -> bool:
    """Whether an ``Accept`` header asks for CSV rather than JSON (:func:`service.api.negotiation.prefers`)."""
    return prefers(accept, CSV)


@router.post("/simulate", response_model=SimulateResponse, responses=RESPONSES)
async def simulate(
    request: Annotated[
        SimulateRequest,
        Body(
            openapi_examples={
                "example_plant": {
                    "summary": "The bundled example plant with a scenario (invented numbers)",
                    "value": load_example("simulate_request.json"),
                },
                "example_plant_limits": {
                    "summary": "The example plant under valve, move and soft output limits (invented numbers)",
                    "value": load_example("simulate_request_limits.json"),
                },
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
    http: Request,
) -> Response:
    """Simulate the loop of design, estimator and (true) plant through a scenario. Design aid only."""
    csv = prefers_csv(http.headers.get("accept"))
    # a coroutine: a light run waits for its solver on the event loop (Budget.arun)
    answer = await budget.arun(run_simulation_answer, request, caps, csv, operation="simulate")
    return Response(answer.body, media_type=answer.media_type)
