"""POST /design/compare: the design in service against a proposed one, as JSON or Markdown."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Request
from fastapi.responses import Response

from service.api.bodies import CheckedBodyRoute
from service.api.compute import BudgetDep
from service.api.deps import CapsDep
from service.api.negotiation import prefers
from service.api.problems import PROBLEM_JSON
from service.pipeline.compare import run_compare
from service.pipeline.compare_text import compare_markdown
from service.pipeline.examples import load_example
from service.schemas.compare import CompareRequest, CompareResponse

__all__ = ["MARKDOWN", "prefers_markdown", "router"]

router = APIRouter(tags=["design"], route_class=CheckedBodyRoute)

MARKDOWN = "text/markdown"

RESPONSES: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "Gain changes, poles, conditioning, robustness when asked, the scenario's figures of merit "
        "and a summary. With `Accept: text/markdown`, the same as Markdown for a change request, with the "
        "design-aid caution and a sign-off block.",
        "content": {MARKDOWN: {"schema": {"type": "string"}}},
    },
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "A field is invalid, or a design or run cannot be formed; `errors` names each field by JSON "
        "pointer (under /in_service, /proposed or /scenario).",
        "content": {PROBLEM_JSON: {}},
    },
}


def prefers_markdown(accept: str | None) -> bool:
    """Whether an ``Accept`` header asks for Markdown rather than JSON (:func:`service.api.negotiation.prefers`)."""
    return prefers(accept, MARKDOWN)


@router.post("/design/compare", response_model=CompareResponse, responses=RESPONSES)
def compare(
    request: Annotated[
        CompareRequest,
        Body(
            openapi_examples={
                "move_weight": {
                    "summary": "The example vessel with lighter move weights and a re-identified model (invented)",
                    "value": load_example("compare_request.json"),
                }
            }
        ),
    ],
    caps: CapsDep,
    budget: BudgetDep,
    http: Request,
) -> Any:
    """Compare the design in service with a proposed one, for a change review. Design aid only."""
    answer = budget.run(run_compare, request, caps, operation="compare")
    if prefers_markdown(http.headers.get("accept")):
        return Response(compare_markdown(answer), media_type=MARKDOWN)
    return answer
