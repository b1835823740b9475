"""POST /design/export: the fixed unconstrained law with its estimator, in forms a control system runs."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import ResponseModel
from service.schemas.design import ADVISORY, DesignRequest, LabelledMatrix, WarningReport

__all__ = [
    "BLOCK_NAME_PATTERN",
    "ExportFormat",
    "ExportRequest",
    "ExportResponse",
    "LawLimits",
    "LawSignal",
    "LawTables",
]

ExportFormat = Literal["state_space", "structured_text"]

#: An identifier of IEC 61131-3: a letter, then letters, digits and single underscores.
BLOCK_NAME_PATTERN = r"^[A-Za-z](_?[A-Za-z0-9])*$"


class ExportRequest(DesignRequest):
    """A /design request with its estimator, and the form to export the law in."""

    format: ExportFormat = Field(
        description="'state_space': the law's discrete state-space matrices, tagged, with its difference "
        "equations and CSV tables (JSON). 'structured_text': an IEC 61131-3 Structured Text function block "
        "(text/plain)."
    )
    block_name: Annotated[str, Field(pattern=BLOCK_NAME_PATTERN, max_length=64)] = Field(
        default="PredictiveLaw",
        description="Name of the generated function block (structured_text): an IEC 61131-3 identifier.",
    )


class LawSignal(ResponseModel):
    """One input or output of the exported law."""

    name: str = Field(description="Its column (row) name in the matrices.")
    role: str = Field(
        description="Inputs: 'measured' (a measured output: model.c_measured's when given, else a "
        "controlled output), 'measured_state' (a plant state, for a full_state estimator), 'setpoint' (of a "
        "controlled output), 'measured_disturbance' or "
        "'input_target' (the target of a manipulated variable, with weights.input); outputs: "
        "'input' (a manipulated variable) or 'move' (its change since the last sample)."
    )
    tag: str = Field(description="The model's tag it belongs to.")
    unit: str | None


class LawLimits(ResponseModel):
    """The request's limits on the manipulated variables, which a control system clamps the law's outputs to."""

    input_min: list[float | None]
    input_max: list[float | None]
    move_max: list[float | None]


class LawTables(ResponseModel):
    """The matrices as CSV tables (RFC 4180): a header of column names, one row per row name."""

    a: str
    b: str
    c: str
    d: str
    state_update: str
    signal_update: str
    applied_update: str
    prediction: str
    input_offset: str = Field(description="input_offset as a table: one row per law input, one column 'offset'.")
    output_offset: str = Field(description="output_offset as a table: one row per law output, one column 'offset'.")


class ExportResponse(ResponseModel):
    """The fixed law ``s(k+1) = A s + B w``, ``v = C s + D w`` from measurements, setpoints and measured
    disturbances ``w`` to inputs and moves ``v``, in engineering units of the tags, plus its split form for
    clamped inputs: ``u = Cu s + Du w`` (the first m rows of C and D), ``s(k+1) = Ap s + Bp w + Bu u_applied``.
    With ``model.operating_point`` the signals are absolute and the matrices act on their deviations:
    ``s(k+1) = A s + B (w - w0)``, ``v = C s + D (w - w0) + v0`` and ``u = Cu s + Du (w - w0) + u0``,
    ``s(k+1) = Ap s + Bp (w - w0) + Bu (u_applied - u0)``, with ``w0 = input_offset``, ``v0 =
    output_offset`` (``u0`` for the inputs, 0 for the moves); both offsets are zeros without one.
    """

    format: ExportFormat
    sample_time: float = Field(description="Run the law once every sample time (the model's time unit).")
    inputs: list[LawSignal] = Field(description="The law's inputs w, in order: measurements, setpoints, disturbances.")
    outputs: list[LawSignal] = Field(description="The law's outputs v: every manipulated variable, then its move.")
    states: list[str] = Field(
        description="The law's state s: the estimator's prior estimate x(k|k-1) (model states, then disturbance "
        "estimates in their signal's units), then the previous inputs u(k-1), all in deviations from the "
        "operating point when there is one. It starts at zero: the plant at rest where the model's signals are "
        "zero, i.e. at the operating point."
    )
    a: LabelledMatrix = Field(description="A = Ap + Bu Cu: the state matrix with the law's input applied unchanged.")
    b: LabelledMatrix = Field(description="B = Bp + Bu Du.")
    c: LabelledMatrix = Field(description="C: inputs u = Cu s + Du w, then moves du = u - u(k-1).")
    d: LabelledMatrix = Field(description="D.")
    state_update: LabelledMatrix = Field(description="Ap of the split form.")
    signal_update: LabelledMatrix = Field(description="Bp of the split form.")
    applied_update: LabelledMatrix = Field(description="Bu: how the applied (clamped) input enters s(k+1).")
    prediction: LabelledMatrix = Field(
        description="The estimator's prediction y(k|k-1) = P s of each measurement: what replaces a bad one "
        "(plus the measurement's input_offset with an operating point)."
    )
    input_offset: list[float] = Field(
        description="w0, per law input in the order of inputs: the operating point (model.operating_point) of "
        "each measurement (operating_point.measured for measured outputs of their own, else the controlled "
        "output's value), of the output a setpoint belongs to, of the measured disturbance, of the manipulated "
        "variable an input target belongs to. The matrices act on w - w0. Zeros without an operating point."
    )
    output_offset: list[float] = Field(
        description="v0, per law output in the order of outputs: the operating point of each manipulated "
        "variable, then 0 for each move (a difference). Added to C s + D (w - w0). Zeros without an operating "
        "point."
    )
    equations: list[str] = Field(
        description="The split form's difference equations written out in the signals as sent (absolute with an "
        "operating point: the offsets appear as constant terms; 10 significant digits, the matrices carry full "
        "precision)."
    )
    tables: LawTables
    limits: LawLimits | None = Field(
        description="From the request's limits block (absolute with an operating point, like the request's); "
        "null without one."
    )
    warnings: list[WarningReport] = Field(description="The design's warnings.")
    fingerprint: str = Field(description="The fingerprint of the design: equal to /design's for the same design.")
    advisory: str = Field(default=ADVISORY)
