"""POST /design/batch: the batch's own checks, and an item answered by its problem.

Each item is a /design request checked, designed and answered by ``service.pipeline.design``;
here are only the rules of the batch itself (its size, unique ids) and the failed item,
whose problem's pointers lead from the batch's root (``/items/3/request/model/a``).
"""

from __future__ import annotations

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.problems import pointer, problem_of
from service.schemas.batch import BatchItem, BatchItemResult, BatchRequest, ProblemReport

__all__ = ["PATH", "check_batch", "failed_item"]

#: The batch's path: the ``instance`` of every item's problem.
PATH = "/design/batch"


def check_batch(batch: BatchRequest, *, max_items: int) -> None:
    """Refuse a batch with more than ``max_items`` items or a repeated id.

    Raises
    ------
    InvalidRequest
        Pointers ``/items`` (too many) and ``/items/<i>/id`` (each repeat).
    """
    problems: list[FieldProblem] = []
    if len(batch.items) > max_items:
        problems.append(
            FieldProblem("/items", f"the batch has {len(batch.items)} items; this service accepts at most {max_items}")
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


def failed_item(item: BatchItem, index: int, exc: BaseException, fingerprint: str | None = None) -> BatchItemResult:
    """The item answered by the problem of ``exc``, its pointers under ``/items/<index>/request``."""
    problem = problem_of(exc, base=pointer("items", index, "request"), scope="item")
    return BatchItemResult.failed(item.id, ProblemReport(**problem.body(PATH)), fingerprint)
