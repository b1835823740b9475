"""Signal tags: a name, an engineering unit and a typical span for each signal."""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel

__all__ = ["OperatingPoint", "SignalTag", "TagList"]

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


class OperatingPoint(RequestModel):
    """The steady values at which the linear model holds, in engineering units.

    With it, every value a request gives or an answer returns (limits, setpoints, initial
    input and setpoint, measured disturbance values, every series and limit report) is
    absolute; the solver works in deviations from it.  Without it, those values are
    deviations from the model's origin.
    """

    inputs: list[FiniteFloat] | None = Field(default=None, description="One value per manipulated variable.")
    outputs: list[FiniteFloat] | None = Field(default=None, description="One value per controlled output.")
    disturbances: list[FiniteFloat] | None = Field(default=None, description="One value per measured disturbance.")
    measured: list[FiniteFloat] | None = Field(
        default=None,
        description="One value per measured output of its own (model.c_measured's rows): the sensors' steady "
        "values at the operating point, engineering units. The deviation model cannot give them (it maps "
        "deviations to deviations), so /simulate and /design/export need them for a model with measured outputs "
        "of their own; the measured series, CSV columns and the exported law's sensor inputs are then absolute. "
        "Leave it out when the measured outputs are the controlled ones (their values are 'outputs').",
    )
