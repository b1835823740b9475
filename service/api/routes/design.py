"""POST /design: the unconstrained predictive controller and its diagnostics."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body
from fastapi.responses import Response

from service.api.bodies import CheckedBodyRoute
from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.metrics import observe_design_sizes
from service.api.problems import PROBLEM_JSON
from service.pipeline.design import run_design_json
from service.pipeline.examples import load_example
from service.schemas.design import DesignRequest, DesignResponse

__all__ = ["router"]

router = APIRouter(tags=["design"], route_class=CheckedBodyRoute)

PROBLEMS: dict[int | str, dict[str, Any]] = {
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "A field is invalid, or the design problem cannot be solved; "
        "`errors` names each field by JSON pointer.",
        "content": {PROBLEM_JSON: {}},
    },
}


@router.post("/design", response_model=DesignResponse, responses=PROBLEMS)
async def design(
    request: Annotated[
        DesignRequest,
        Body(
            openapi_examples={
                "example_plant": {
                    "summary": "The bundled example plant (invented numbers)",
                    "value": load_example("design_request.json"),
                },
                "robustness": {
                    "summary": "The example plant with its estimator and the robustness block (invented numbers)",
                    "value": load_example("design_request_robustness.json"),
                },
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
) -> Response:
    """Design the predictive controller: gains, Hessian conditioning, closed-loop poles. Design aid only."""
    # The solver process writes the JSON (the response model's own serializer), so this
    # process neither unpickles the model nor validates and serializes it again.  A coroutine:
    # a light design waits for its solver on the event loop, without a worker thread.
    answer = await budget.arun(run_design_json, request, caps, operation="design")
    observe_design_sizes(answer.sizes)
    return Response(answer.body, media_type="application/json")
