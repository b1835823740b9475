"""POST /design/batch: many design requests in one call, each answered on its own.

The envelope (ids, fingerprints) is validated as a whole; each item's ``request`` is taken
as raw JSON and validated separately as a :class:`~service.schemas.design.DesignRequest`, so
one bad item gets its own problem and never fails the others.  The schema still documents
``request`` as a DesignRequest.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import Field, GetJsonSchemaHandler
from pydantic.json_schema import JsonSchemaValue
from pydantic_core import CoreSchema

from service.schemas.common import RequestModel, ResponseModel
from service.schemas.design import DesignRequest, DesignResponse

__all__ = [
    "BatchItem",
    "BatchItemResult",
    "BatchRequest",
    "BatchResponse",
    "FieldProblemReport",
    "ProblemReport",
]


class _DocumentedAsDesignRequest:
    """Document a raw JSON value as a DesignRequest (it is validated as one, item by item)."""

    @classmethod
    def __get_pydantic_json_schema__(cls, core_schema: CoreSchema, handler: GetJsonSchemaHandler) -> JsonSchemaValue:
        return handler(DesignRequest.__pydantic_core_schema__)


class BatchItem(RequestModel):
    """One design request of a batch, named by the caller."""

    id: str = Field(min_length=1, max_length=200, description="The caller's name for the item, unique in the batch.")
    request: Annotated[Any, _DocumentedAsDesignRequest] = Field(
        description="A POST /design request body; checked on its own, errors point into it."
    )
    known_fingerprint: str | None = Field(
        default=None,
        max_length=200,
        description="The fingerprint of the caller's current design for this item. When the "
        "request's fingerprint equals it, the item is answered 'unchanged' without solving.",
    )


class BatchRequest(RequestModel):
    """A batch of design requests, answered in the same order."""

    items: list[BatchItem] = Field(min_length=1, description="The items; at most the service's batch cap.")


class FieldProblemReport(ResponseModel):
    """One field of a problem: a JSON pointer and a sentence."""

    pointer: str
    detail: str


class ProblemReport(ResponseModel):
    """An RFC 9457 problem, as the service answers it for a single request."""

    type: str
    title: str
    status: int
    detail: str
    instance: str
    errors: list[FieldProblemReport]


class BatchItemResult(ResponseModel):
    """The answer to one item: its design, 'unchanged', or its own problem."""

    id: str
    status: Literal["designed", "unchanged", "failed"] = Field(
        description="'designed': result holds the design; 'unchanged': the request's fingerprint "
        "equals known_fingerprint, so the caller's design stands (result is null); 'failed': "
        "problem says why, with pointers prefixed /items/<index>/request."
    )
    fingerprint: str | None = Field(description="The request's fingerprint; null when the request is invalid.")
    result: DesignResponse | None
    problem: ProblemReport | None

    @classmethod
    def failed(cls, item_id: str, problem: ProblemReport, fingerprint: str | None = None) -> BatchItemResult:
        """An item answered by a problem."""
        return cls(id=item_id, status="failed", fingerprint=fingerprint, result=None, problem=problem)


class BatchResponse(ResponseModel):
    """One answer per item, in the order of the request."""

    items: list[BatchItemResult]
