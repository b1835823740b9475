"""POST /identify: plant-test data to a fitted model that /design takes unchanged."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body

from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.routes.design import PROBLEMS
from service.pipeline.examples import load_example
from service.pipeline.identify import run_identify
from service.schemas.identify import IdentifyRequest, IdentifyResponse

__all__ = ["router"]

router = APIRouter(tags=["identify"])


@router.post("/identify", response_model=IdentifyResponse, responses=PROBLEMS)
def identify(
    request: Annotated[
        IdentifyRequest,
        Body(
            openapi_examples={
                "plant_test": {
                    "summary": "A plant test of the example vessel (invented numbers)",
                    "value": load_example("identify_request.json"),
                }
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
) -> IdentifyResponse:
    """Fit a dead-time model per output/input pair to plant-test data. Design aid only: review the fit."""
    return budget.run(run_identify, request, caps, operation="identify")
