"""POST /design/sweep: one tuning parameter over a list of values, side by side."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body

from service.api.bodies import CheckedBodyRoute
from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.routes.design import PROBLEMS
from service.pipeline.examples import load_example
from service.pipeline.sweep import run_sweep
from service.schemas.sweep import SweepRequest, SweepResponse

__all__ = ["router"]

router = APIRouter(tags=["design"], route_class=CheckedBodyRoute)


@router.post("/design/sweep", response_model=SweepResponse, responses=PROBLEMS)
def sweep(
    request: Annotated[
        SweepRequest,
        Body(
            openapi_examples={
                "move_weight": {
                    "summary": "The example plant with the steam valve's move weight swept",
                    "value": load_example("sweep_request.json"),
                }
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
) -> SweepResponse:
    """Redo the design for each value of one tuning parameter; each entry equals a separate /design call."""
    return budget.run(run_sweep, request, caps, operation="sweep")
