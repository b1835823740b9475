"""POST /design/batch: a gain refresh for many operating points in one call.

Each item is answered on its own, in order: its design, ``unchanged`` when the caller's
``known_fingerprint`` equals the request's fingerprint (nothing is solved), or its own
problem details (the pointers lead from the batch's root: ``/items/3/request/model/a``).
The whole batch shares one compute time limit; items it does not reach in time fail with
a ``time-limit`` problem while the ones answered before keep their results.
"""

from __future__ import annotations

import logging
from typing import Annotated, Any

from fastapi import APIRouter, Body
from pydantic import ValidationError

from service.api.bodies import CheckedBodyRoute
from service.api.compute import Budget, BudgetDep
from service.api.deps import SettingsDep
from service.api.metrics import count_rejection, observe_design
from service.api.problems import PROBLEM_JSON
from service.errors import Cancelled, ComputeCrashed, ComputeDied, MovecastError
from service.pipeline.batch import check_batch, failed_item
from service.pipeline.caps import Caps
from service.pipeline.design import run_design
from service.pipeline.examples import load_example
from service.pipeline.fingerprint import fingerprint
from service.pipeline.memory import check_request_memory
from service.schemas.batch import BatchItem, BatchItemResult, BatchRequest, BatchResponse

__all__ = ["router"]

router = APIRouter(tags=["design"], route_class=CheckedBodyRoute)
log = logging.getLogger("movecast.batch")

PROBLEMS: dict[int | str, dict[str, Any]] = {
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "The batch itself is invalid (too many items, a duplicate or missing id); "
        "an item's own errors are answered inside the 200 response instead.",
        "content": {PROBLEM_JSON: {}},
    },
}


def _failed(item: BatchItem, index: int, exc: BaseException, fp: str | None = None) -> BatchItemResult:
    if isinstance(exc, ComputeDied):
        log.error("the compute process died on batch item %d: %s", index, exc)
    elif isinstance(exc, ComputeCrashed):
        log.error("compute process failure on batch item %d: %s", index, exc)
    result = failed_item(item, index, exc, fp)
    assert result.problem is not None
    count_rejection(result.problem.type.rsplit(":", 1)[-1])
    return result


def _answer(index: int, item: BatchItem, caps: Caps, budget: Budget) -> BatchItemResult:
    """Validate, fingerprint and design one item; every failure stays inside the item."""
    try:
        request = item.design_request()  # validated once: the memory estimate read it first
    except ValidationError as exc:
        return _failed(item, index, exc)
    fp = fingerprint(request)
    if item.known_fingerprint is not None and item.known_fingerprint == fp:
        return BatchItemResult(id=item.id, status="unchanged", fingerprint=fp, result=None, problem=None)
    try:
        response = budget.run(run_design, request, caps, operation="design")
    except Cancelled:
        raise
    except MovecastError as exc:
        return _failed(item, index, exc, fp)
    observe_design(response)
    return BatchItemResult(id=item.id, status="designed", fingerprint=fp, result=response, problem=None)


@router.post("/design/batch", response_model=BatchResponse, responses=PROBLEMS)
def design_batch(
    batch: Annotated[
        BatchRequest,
        Body(
            openapi_examples={
                "two_grades": {
                    "summary": "Two grades of the example plant, one already known (invented numbers)",
                    "value": load_example("batch_request.json"),
                }
            }
        ),
    ],
    settings: SettingsDep,
    budget: BudgetDep,
) -> BatchResponse:
    """Design many controllers in one call; each item gets its own result or problem, in order."""
    check_batch(batch, max_items=settings.max_batch_items)
    caps = settings.caps()
    # the answers kept together, and the largest item's design; then the answers' room here
    budget.hold_answer(check_request_memory(batch, caps))
    return BatchResponse(items=[_answer(i, item, caps, budget) for i, item in enumerate(batch.items)])
