"""POST /identify: plant-test data to a fitted model that /design takes unchanged."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, Query

from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.routes.design import PROBLEMS
from service.pipeline.examples import example_path, load_example
from service.pipeline.identify import run_identify
from service.pipeline.identify_csv import identify_request_from_csv
from service.schemas.identify import IdentifyRequest, IdentifyResponse
from service.schemas.identify_csv import IdentifyCsvOptions

__all__ = ["router"]

router = APIRouter(tags=["identify"])

#: The OpenAPI examples carry two hours of the steam valve and the temperature from the
#: example plant test (the whole test, every tag, is in openapi/examples/), so that trying
#: them stays quick.
EXAMPLE_SAMPLES = 120
EXAMPLE_TAGS = ("steam_valve", "vessel_temperature")


def _json_example() -> dict[str, object]:
    request = load_example("identify_request.json")
    return {
        "sample_time": request["sample_time"],
        "inputs": [EXAMPLE_TAGS[0]],
        "outputs": [EXAMPLE_TAGS[1]],
        "data": {tag: request["data"][tag][:EXAMPLE_SAMPLES] for tag in EXAMPLE_TAGS},
        "max_dead_time": 10.0,
        "settling_time": 40.0,
    }


def _csv_example() -> str:
    lines = example_path("plant_test.csv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    keep = [0, *(header.index(tag) for tag in EXAMPLE_TAGS)]
    rows = [",".join(line.split(",")[k] for k in keep) for line in lines[: EXAMPLE_SAMPLES + 1]]
    return "\n".join(rows) + "\n"


@router.post("/identify", response_model=IdentifyResponse, responses=PROBLEMS)
def identify(
    request: Annotated[
        IdentifyRequest,
        Body(
            openapi_examples={
                "plant_test": {
                    "summary": "Two hours of a plant test of the example vessel (invented numbers)",
                    "value": _json_example(),
                }
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
) -> IdentifyResponse:
    """Fit a dead-time model per output/input pair to plant-test data. Design aid only: review the fit."""
    return budget.run(run_identify, request, caps, operation="identify")


@router.post(
    "/identify/csv",
    response_model=IdentifyResponse,
    responses=PROBLEMS,
)
def identify_csv(
    body: Annotated[
        bytes,
        Body(
            media_type="text/csv",
            description="A historian export: a header row of tags, then one row per sample; a time column "
            "(numbers in the time unit, or ISO 8601 date-times) is the first column unless time_column says.",
            openapi_examples={
                "plant_test": {
                    "summary": "Two hours of the plant test of the example vessel (invented numbers)",
                    "value": _csv_example(),
                }
            },
        ),
    ],
    options: Annotated[IdentifyCsvOptions, Query()],
    caps: CapsDep,
    budget: BudgetDep,
) -> IdentifyResponse:
    """POST /identify with the data as CSV and the choices as query parameters. Design aid only: review the fit."""
    request = identify_request_from_csv(body, options)
    return budget.run(run_identify, request, caps, operation="identify")
