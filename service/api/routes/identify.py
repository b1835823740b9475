"""POST /identify: plant-test data to a fitted model that /design takes unchanged.

The data come as JSON columns (``application/json``) or as a historian's CSV export
(``text/csv``) with the choices as query parameters (``service.schemas.identify_csv``);
anything else is a 415.  ``POST /identify/csv`` is the older, deprecated path of the CSV form.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Query, Request
from pydantic import ValidationError

from service.api.bodies import csv_body_route, json_content_type
from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.problems import PROBLEM_JSON
from service.api.routes.design import PROBLEMS
from service.errors import InvalidRequest, UnsupportedMediaType
from service.pipeline.examples import example_path, load_example
from service.pipeline.identify import run_identify
from service.pipeline.identify_csv import identify_request_from_csv
from service.pipeline.problems import validation_problems
from service.schemas.identify import IdentifyRequest, IdentifyResponse
from service.schemas.identify_csv import IdentifyCsvOptions

__all__ = ["router"]


def read_csv_request(body: bytes, query: Mapping[str, str]) -> IdentifyRequest:
    """The /identify request of a CSV body and its query parameters (pointers name the parameter or cell)."""
    try:
        options = IdentifyCsvOptions.model_validate(query)
    except ValidationError as exc:
        raise InvalidRequest(validation_problems(exc.errors(include_url=False, include_input=False))) from None
    return identify_request_from_csv(body, options)


router = APIRouter(tags=["identify"], route_class=csv_body_route(read_csv_request))

#: The problems of POST /identify, whose body may be JSON or CSV.
IDENTIFY_PROBLEMS: dict[int | str, dict[str, Any]] = {
    **PROBLEMS,
    415: {
        "description": "The body is sent neither as JSON (`application/json`) nor as CSV (`text/csv`), or is "
        "sent compressed; `Accept-Post` or `Accept-Encoding` says what is taken.",
        "content": {PROBLEM_JSON: {}},
    },
}
#: The problems of the deprecated POST /identify/csv, which reads any body but JSON as CSV.
IDENTIFY_CSV_PROBLEMS: dict[int | str, dict[str, Any]] = {
    **PROBLEMS,
    415: {
        "description": "The body is sent as JSON (send JSON columns to POST /identify) or compressed.",
        "content": {PROBLEM_JSON: {}},
    },
}

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


#: Query parameters of POST /identify with a CSV body, from IdentifyCsvOptions.
REQUIRED_WITH_CSV = ("sample_time", "inputs", "outputs")
CSV_DESCRIPTION = (
    "A historian export: a header row of tags, then one row per sample; a time column (numbers in the time "
    "unit, or ISO 8601 date-times) is the first column unless time_column says. The choices come as query "
    "parameters (sample_time, inputs and outputs required)."
)


def _query_schema(schema: dict[str, Any]) -> dict[str, Any]:
    """A property's JSON schema without the null of an optional field (a query parameter is left out instead)."""
    kept = {k: v for k, v in schema.items() if k not in {"anyOf", "default", "title", "description"}}
    if schema.get("default") not in (None, ""):
        kept["default"] = schema["default"]
    choices = [c for c in schema.get("anyOf", []) if c.get("type") != "null"]
    if len(choices) == 1:
        kept.update(choices[0])
    elif choices:
        kept["anyOf"] = choices
    return kept


def _csv_parameters() -> list[dict[str, Any]]:
    properties = IdentifyCsvOptions.model_json_schema()["properties"]
    parameters = []
    for name, schema in properties.items():
        rule = "required with a text/csv body" if name in REQUIRED_WITH_CSV else "optional"
        described = schema.get("description", "").rstrip(".")
        parameters.append(
            {
                "name": name,
                "in": "query",
                "required": False,
                "description": f"text/csv bodies only ({rule}; a JSON body takes none){': ' + described if described else ''}.",
                "schema": _query_schema(schema),
            }
        )
    return parameters


IDENTIFY_OPENAPI: dict[str, Any] = {
    "parameters": _csv_parameters(),
    "requestBody": {
        "content": {
            "text/csv": {
                "schema": {"type": "string", "description": CSV_DESCRIPTION},
                "examples": {
                    "plant_test": {
                        "summary": "Two hours of the plant test of the example vessel (invented numbers)",
                        "value": _csv_example(),
                    }
                },
            }
        }
    },
}


@router.post("/identify", response_model=IdentifyResponse, responses=IDENTIFY_PROBLEMS, openapi_extra=IDENTIFY_OPENAPI)
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
    """Fit a model to plant-test data, sent as JSON columns or as CSV (text/csv) with the choices as query
    parameters. Design aid only: review the fit."""
    return budget.run(run_identify, request, caps, operation="identify")


async def _refuse_what_is_no_csv(http: Request) -> None:
    """415 for a compressed body or a JSON one on the CSV path, as POST /identify answers them.

    Other content types are read as CSV, as this older path always has (``curl --data-binary``
    sends a form's content type unless told otherwise).
    """
    encoding = http.headers.get("content-encoding", "").strip().lower()
    if encoding not in ("", "identity"):
        raise UnsupportedMediaType(
            f"The request body is sent with 'Content-Encoding: {encoding[:40]}'; this service reads "
            "bodies uncompressed only: send it without a Content-Encoding.",
            encoding=True,
        )
    if json_content_type(http.headers.get("content-type")):
        raise UnsupportedMediaType(
            "This path takes the plant test as CSV ('Content-Type: text/csv'); send JSON columns to POST /identify.",
            accepted="text/csv",
        )


@router.post(
    "/identify/csv",
    response_model=IdentifyResponse,
    responses=IDENTIFY_CSV_PROBLEMS,
    deprecated=True,
    dependencies=[Depends(_refuse_what_is_no_csv)],  # before the body is checked
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
    """Deprecated: send the CSV to POST /identify with 'Content-Type: text/csv' and the same query parameters.

    Kept for existing clients; it answers as POST /identify does. Design aid only: review the fit."""
    request = identify_request_from_csv(body, options)
    return budget.run(run_identify, request, caps, operation="identify")
