"""POST /design/batch: many design requests in one call, each answered on its own.

The envelope (ids, fingerprints) is validated as a whole; each item's ``request`` is taken
as raw JSON and validated separately as a :class:`~service.schemas.design.DesignRequest`,
so one bad item gets its own problem and never fails the others.  The schema says so: ``request``
takes any JSON value (``x-validated-as`` names the DesignRequest schema), validated per item.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import Field, PrivateAttr, ValidationError

from service.schemas.common import OmittedErrors, RequestModel, ResponseModel
from service.schemas.design import DesignRequest, DesignResponse

__all__ = [
    "BatchItem",
    "BatchItemResult",
    "BatchRequest",
    "BatchResponse",
    "FieldProblemReport",
    "ProblemReport",
]


class BatchItem(RequestModel):
    """One design request of a batch, named by the caller."""

    id: str = Field(min_length=1, max_length=200, description="The caller's name for the item, unique in the batch.")
    request: Any = Field(
        description="A POST /design request body (the DesignRequest schema). Any JSON value is taken here and "
        "validated on its own, item by item: an item that is not a valid DesignRequest is answered inside the "
        "200 response with its own problem (status 'failed', pointers into the batch such as "
        "/items/3/request/model/a), never failing the batch. Only the envelope (ids) is checked as a whole.",
        json_schema_extra={"x-validated-as": "#/components/schemas/DesignRequest"},
    )
    known_fingerprint: str | None = Field(
        default=None,
        max_length=200,
        description="The fingerprint of the caller's current design for this item. When the "
        "request's fingerprint equals it, the item is answered 'unchanged' without solving.",
    )
    _validated: DesignRequest | ValidationError | None = PrivateAttr(default=None)

    def design_request(self) -> DesignRequest:
        """The item's ``request`` validated as a :class:`DesignRequest`, once per item.

        The memory estimate of the batch and the item's design both read it, so a batch of
        large items is validated once, not twice.

        Raises
        ------
        pydantic.ValidationError
            The same error on every call, when the item is not a valid design request.
        """
        if self._validated is None:
            try:
                self._validated = DesignRequest.model_validate(self.request)
            except ValidationError as exc:
                self._validated = exc
        if isinstance(self._validated, ValidationError):
            raise self._validated
        return self._validated


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
    omitted_errors: OmittedErrors = None


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
