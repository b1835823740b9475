"""Signal tags: a name, an engineering unit and a typical span for each signal."""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel

__all__ = ["SignalTag", "TagList"]

TagName = Annotated[str, Field(min_length=1, max_length=64, pattern=r"^[^\x00-\x1f]+$")]


class SignalTag(RequestModel):
    """One signal's tag: how the plant calls it, its unit and its typical span."""

    name: TagName = Field(description="Tag name, e.g. 'TIC-101.PV'; unique within its list.")
    unit: Annotated[str, Field(max_length=32)] | None = Field(
        default=None, description="Engineering unit, e.g. 'degC', 't/h', '%'."
    )
    span: Annotated[FiniteFloat, Field(gt=0)] | None = Field(
        default=None,
        description="Typical range in engineering units. When given for a list, weights apply to "
        "the signal divided by its span (see the README on scaling).",
    )


TagList = list[SignalTag]
