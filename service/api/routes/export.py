"""POST /design/export: the fixed unconstrained law with its estimator, for a control system."""

from __future__ import annotations

import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Body
from fastapi.responses import PlainTextResponse

from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.problems import PROBLEM_JSON
from service.pipeline.examples import load_example
from service.pipeline.export import run_export
from service.schemas.export import ExportRequest, ExportResponse

__all__ = ["router"]

router = APIRouter(tags=["design"])

RESPONSES: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "format 'state_space': the law's matrices, tagged, with its difference equations and CSV "
        "tables (JSON). format 'structured_text': an IEC 61131-3 function block as text/plain, whose header "
        "carries the design's fingerprint, the date and the caution that it must be reviewed and tested before use.",
        "content": {"text/plain": {"schema": {"type": "string"}}},
    },
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "A field is invalid, or the design, estimator or law cannot be formed; `errors` names "
        "each field by JSON pointer.",
        "content": {PROBLEM_JSON: {}},
    },
}


@router.post("/design/export", response_model=ExportResponse, responses=RESPONSES)
def export(
    request: Annotated[
        ExportRequest,
        Body(
            openapi_examples={
                "state_space": {
                    "summary": "The example plant's law as state-space matrices (invented numbers)",
                    "value": load_example("export_request.json"),
                },
                "structured_text": {
                    "summary": "The example plant's law as a Structured Text function block with limits",
                    "value": load_example("export_request_structured_text.json"),
                },
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
) -> Any:
    """Export the fixed law (controller with its estimator) as state-space matrices or Structured Text. Design aid only."""
    generated = datetime.datetime.now(datetime.UTC).date().isoformat()
    answer = budget.run(run_export, request, caps, generated, operation="export")
    if isinstance(answer, str):
        return PlainTextResponse(answer)
    return answer
