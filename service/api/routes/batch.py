"""POST /design/batch: a gain refresh for many operating points in one call.

Each item is answered on its own, in order: its design, ``unchanged`` when the caller's
``known_fingerprint`` equals the request's fingerprint (nothing is solved), or its own
problem details (the pointers lead from the batch's root: ``/items/3/request/model/a``).
The whole batch shares one compute time limit; items it does not reach in time fail with
a ``time-limit`` problem while the ones answered before keep their results.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Annotated

from fastapi import APIRouter, Body
from pydantic import ValidationError

from service.api.bodies import CheckedBodyRoute
from service.api.compute import Budget, BudgetDep, SolverCrashed, SolverDied, SolverOutOfMemory, TimeLimitExceeded
from service.api.deps import SettingsDep
from service.api.metrics import count_rejection, observe_design
from service.api.problems import PROBLEM_JSON, problem_body, validation_problems
from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.design import run_design
from service.pipeline.examples import load_example
from service.pipeline.fingerprint import fingerprint
from service.schemas.batch import BatchItem, BatchItemResult, BatchRequest, BatchResponse
from service.schemas.common import Caps, pointer
from service.schemas.design import DesignRequest

__all__ = ["router"]

router = APIRouter(tags=["design"], route_class=CheckedBodyRoute)
log = logging.getLogger("movecast.batch")

PATH = "/design/batch"
PROBLEMS = {
    400: {"description": "The body is not valid JSON.", "content": {PROBLEM_JSON: {}}},
    422: {
        "description": "The batch itself is invalid (too many items, a duplicate or missing id); "
        "an item's own errors are answered inside the 200 response instead.",
        "content": {PROBLEM_JSON: {}},
    },
}


def _prefixed(base: str, problems: list[FieldProblem]) -> list[FieldProblem]:
    return [FieldProblem(base + p.pointer, p.detail) for p in problems]


def _failed(
    item: BatchItem,
    kind: str,
    status: int,
    detail: str,
    problems: Sequence[FieldProblem] = (),
    fp: str | None = None,
) -> BatchItemResult:
    count_rejection(kind)
    return BatchItemResult.failed(item.id, problem_body(kind, status, detail, PATH, problems), fp)


def _answer(index: int, item: BatchItem, caps: Caps, budget: Budget) -> BatchItemResult:
    """Validate, fingerprint and design one item; every failure stays inside the item."""
    base = pointer("items", index, "request")
    try:
        request = DesignRequest.model_validate(item.request)
    except ValidationError as exc:
        problems = _prefixed(base, validation_problems(exc.errors()))  # type: ignore[arg-type]
        return _failed(item, "invalid-request", 422, f"The item has {len(problems)} invalid field(s).", problems)
    fp = fingerprint(request)
    if item.known_fingerprint is not None and item.known_fingerprint == fp:
        return BatchItemResult(id=item.id, status="unchanged", fingerprint=fp, result=None, problem=None)
    try:
        response = budget.run(run_design, request, caps, operation="design")
    except InvalidRequest as exc:
        problems = _prefixed(base, exc.problems)
        return _failed(item, "invalid-request", 422, f"The item has {len(problems)} invalid field(s).", problems, fp)
    except NumericalError as exc:
        problems = [FieldProblem(base + exc.pointer, exc.detail)] if exc.pointer else []
        return _failed(item, "numerical-problem", 422, exc.detail, problems, fp)
    except TimeLimitExceeded as exc:
        return _failed(
            item,
            "time-limit",
            503,
            f"The batch's compute time limit of {exc.seconds:g} s ran out before this item was designed.",
            fp=fp,
        )
    except SolverOutOfMemory:
        return _failed(
            item,
            "out-of-memory",
            422,
            "The solver ran out of memory designing this item; shorten its horizons or reduce its model.",
            fp=fp,
        )
    except SolverDied:
        log.error("the solver process died on batch item %d", index)
        return _failed(
            item, "solver-failed", 503, "The solver process stopped while designing this item; retry it.", fp=fp
        )
    except SolverCrashed:
        log.error("solver failure on batch item %d", index)
        return _failed(
            item, "internal-error", 500, "The service failed to design this item; the error is logged.", fp=fp
        )
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
    problems: list[FieldProblem] = []
    if len(batch.items) > settings.max_batch_items:
        problems.append(
            FieldProblem(
                "/items",
                f"the batch has {len(batch.items)} items; this service accepts at most {settings.max_batch_items}",
            )
        )
    seen: dict[str, int] = {}
    for index, item in enumerate(batch.items):
        if item.id in seen:
            problems.append(
                FieldProblem(
                    pointer("items", index, "id"), f"the id {item.id!r} is already used by item {seen[item.id]}"
                )
            )
        seen.setdefault(item.id, index)
    if problems:
        raise InvalidRequest(problems)
    caps = settings.caps()
    return BatchResponse(items=[_answer(i, item, caps, budget) for i, item in enumerate(batch.items)])
