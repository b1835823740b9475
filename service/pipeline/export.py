"""POST /design/export: the fixed unconstrained law with its estimator, tagged, in engineering units.

Three steps, as for /design: :func:`check_export_request` (the /design checks, then what the
law needs: no measured feed-through), :func:`compute_export` (design, estimator and the law of
:mod:`service.solver.estimation.fixed_law`, changed to the tags' units) and
:func:`export_response` (the matrices, difference equations and CSV tables).
:mod:`service.pipeline.structured_text` writes the same law as a function block.

Units.  The law is formed in the design's scaled signals and changed to engineering units by
the spans (``law_in_units``): measurements by the measured outputs' spans (the controlled
outputs' unless the model has measured outputs of its own; the plant states, never scaled,
for ``full_state``), setpoints by the controlled outputs' spans, measured
disturbances by theirs, the manipulated variables and their input targets (with
``weights.input``) by theirs; the law's state holds the
model's states as they are, the disturbance estimates in their signal's units and the
previous inputs in the inputs' units.

Operating point.  With ``model.operating_point`` (:mod:`service.pipeline.operating_point`) the
request is checked and designed in deviations, as /design does, and the law's signals are
absolute: the law is the deviation law with constant offsets, ``w_dev = w - w0`` on its inputs
(``w0`` per input: the output's ``z0`` for measurements and setpoints, ``d0`` for measured
disturbances, ``u0`` for input targets) and ``v = v_dev + v0`` on its outputs (``u0`` for the
inputs, 0 for the moves).  Written out, the split form is affine ::

    u        = Cu s + Du w + (u0 - Du w0)
    s(k+1)   = Ap s + Bp w + Bu u_applied - (Bp w0 + Bu u0)
    y(k|k-1) = P s + z0

with the state ``s`` in deviations (zero at rest at the operating point).  The answer carries
``w0`` and ``v0`` (``input_offset``, ``output_offset``), the difference equations carry the
constants, and the limits (``limits``, the Structured Text clamp) are absolute like the
request's.  Without an operating point both offsets are zero and the law is linear.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.caps import Caps
from service.pipeline.csv_cells import text_cell
from service.pipeline.design import DesignInputs, DesignOutcome, check_design_request, compute_design
from service.pipeline.estimator import disturbance_spans, scaled_estimator
from service.pipeline.fingerprint import design_fingerprint
from service.pipeline.operating_point import (
    OperatingPointValues,
    check_operating_point,
    checked_at_point,
    to_deviations,
)
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.pipeline.structured_text import BlockText, structured_text
from service.schemas.design import DesignRequest, LabelledMatrix, WarningReport
from service.schemas.export import ExportRequest, ExportResponse, LawLimits, LawSignal, LawTables
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.fixed_law import FixedLaw, fixed_law, law_in_units

__all__ = [
    "ExportInputs",
    "ExportOutcome",
    "LawLabels",
    "block_source",
    "check_export_request",
    "compute_export",
    "difference_equations",
    "export_response",
    "law_labels",
    "law_offsets",
    "run_export",
]


@dataclass(frozen=True)
class ExportInputs:
    """An export request after every check."""

    design: DesignInputs
    format: str
    block_name: str
    point: OperatingPointValues | None = None


@dataclass(frozen=True)
class ExportOutcome:
    """What :func:`compute_export` computed.

    Attributes
    ----------
    design : DesignOutcome
    estimator : Estimator
        On the scaled plant.
    law : FixedLaw
        In engineering units of the tags (module notes).
    """

    design: DesignOutcome
    estimator: Estimator
    law: FixedLaw


@dataclass(frozen=True)
class LawLabels:
    """Names of the law's inputs, outputs and states, with the signals they belong to."""

    inputs: list[LawSignal]
    outputs: list[LawSignal]
    states: list[str]


def _law_problems(request: DesignRequest, inputs: DesignInputs) -> list[FieldProblem]:
    plant = inputs.plant
    problems: list[FieldProblem] = []
    assert inputs.estimator is not None
    if np.any(plant.d_measured) and inputs.estimator.kind != "full_state":
        i, j = (int(k) for k in np.argwhere(plant.d_measured)[0])
        problems.append(
            FieldProblem(
                pointer("model", "d_measured", i),
                f"the law cannot be exported with a measured feed-through (d_measured[{i}][{j}] = "
                f"{plant.d_measured[i, j]:g}): its estimator subtracts d_measured times the input of the same "
                f"sample, so the input the law computes would depend on a measurement that depends on that very "
                f"input (an algebraic loop). A control system reads its measurements before it writes its outputs "
                f"and cannot close that loop. Model the path with a state (the measurement then sees the input "
                f"one sample later) and leave d_measured out",
            )
        )
    return problems


def check_export_request(request: ExportRequest, caps: Caps) -> ExportInputs:
    """Run the /design checks, then those of the law, on the request in deviations.

    With ``model.operating_point`` the request is first turned into deviations
    (:func:`service.pipeline.operating_point.to_deviations`) and the operating point checked
    against the plant's sizes and the limits.

    Raises
    ------
    InvalidRequest
        With one FieldProblem per broken rule, each naming its field by JSON pointer.
    """
    deviations, point = to_deviations(request)
    assert isinstance(deviations, ExportRequest)
    inputs = checked_at_point(lambda: check_design_request(deviations, caps), deviations, point, caps)
    problems = _law_problems(deviations, inputs)
    if problems:
        raise InvalidRequest(problems)
    if point is not None:
        check_operating_point(deviations, point, inputs.plant)
    return ExportInputs(design=inputs, format=request.format, block_name=request.block_name, point=point)


def law_offsets(
    plant: DiscretePlant, point: OperatingPointValues | None, law: FixedLaw
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return ``w0`` (nw,) and ``u0`` (m,): the operating point of each law input and manipulated variable.

    ``w0`` is ``[y0; z0; d0; u0]`` (measurements, setpoints, measured disturbances, input
    targets when the law takes them), in engineering units; zeros without an operating point.
    ``y0`` is ``operating_point.measured`` for measured outputs of their own, else ``z0``.
    """
    p, m, md = law.measured, law.inputs, law.disturbances
    if point is None:
        return np.zeros(p + law.setpoints + md + law.targets), np.zeros(m)
    y0 = np.array(point.measured_values(plant), dtype=float)  # check_operating_point refuses full_state
    assert y0.size == p, (y0.size, p)
    z0 = np.array([point.output(i) for i in range(law.setpoints)], dtype=float)
    d0 = np.array([point.disturbance(k) for k in range(md)], dtype=float)
    u0 = np.array([point.input(j) for j in range(m)], dtype=float)
    return np.concatenate([y0, z0, d0, u0 if law.targets else np.zeros(0)]), u0


def compute_export(inputs: ExportInputs) -> ExportOutcome:
    """Design, build the estimator and the fixed law; return the law in engineering units.

    Raises
    ------
    service.errors.NumericalError
        From the design or the estimator, or pointer ``/model`` when the law's matrices are
        not finite numbers.
    """
    plant = inputs.design.plant
    outcome = compute_design(inputs.design)
    estimator = outcome.estimator
    if estimator is None:
        assert inputs.design.estimator is not None
        estimator = scaled_estimator(inputs.design.estimator, plant, outcome.scaled)
    su, sz = plant.input_spans, plant.output_spans
    # what the law reads: the measured outputs, or the plant states (never scaled) for full_state
    sy = np.ones(estimator.state_size) if estimator.full_state else plant.measured_spans
    sd = plant.disturbance_spans if plant.b_disturbance is not None else np.ones(0)
    with np.errstate(over="ignore", invalid="ignore"):
        scaled_law = fixed_law(outcome.design, estimator, b_disturbance=outcome.scaled.b_disturbance)
        law = law_in_units(
            scaled_law,
            state_span=np.concatenate(
                [np.ones(estimator.state_size), disturbance_spans(plant, estimator.disturbance), su]
            ),
            signal_span=np.concatenate([sy, sz, sd, su if scaled_law.targets else np.ones(0)]),
            input_span=su,
            measured_span=sy,
        )
    matrices = (law.input_state, law.input_direct, law.state_update, law.signal_update, law.applied_update)
    if not all(np.all(np.isfinite(x)) for x in (*matrices, law.prediction)):
        raise NumericalError(
            "The exported law's matrices are not finite numbers: the model's numbers are too large or too "
            "small for double precision. Rescale the model",
            field=("model",),
        )
    return ExportOutcome(design=outcome, estimator=estimator, law=law)


def law_labels(plant: DiscretePlant, estimator: Estimator, *, targets: bool = False) -> LawLabels:
    """Names of the law's inputs (``<tag>.measured``, ``<tag>.setpoint``, ``<tag>.measured_disturbance``,
    ``<tag>.target`` with input targets), outputs and states.

    The measurements are the measured outputs (their own tags with ``c_measured``), or the plant
    states (``<state>.measured``, role ``measured_state``) for ``full_state``; the setpoints
    belong to the controlled outputs.
    """
    if estimator.full_state:
        inputs = [
            LawSignal(name=f"{label}.measured", role="measured_state", tag=label, unit=None)
            for label in plant.state_labels
        ]
    else:
        inputs = [
            LawSignal(name=f"{s.name}.measured", role="measured", tag=s.name, unit=s.unit) for s in plant.measured
        ]
    inputs += [LawSignal(name=f"{s.name}.setpoint", role="setpoint", tag=s.name, unit=s.unit) for s in plant.outputs]
    inputs += [
        LawSignal(name=f"{s.name}.measured_disturbance", role="measured_disturbance", tag=s.name, unit=s.unit)
        for s in plant.disturbances
    ]
    if targets:
        inputs += [
            LawSignal(name=f"{s.name}.target", role="input_target", tag=s.name, unit=s.unit) for s in plant.inputs
        ]
    outputs = [LawSignal(name=s.name, role="input", tag=s.name, unit=s.unit) for s in plant.inputs]
    outputs += [LawSignal(name=f"{s.name}.move", role="move", tag=s.name, unit=s.unit) for s in plant.inputs]
    # full_state: the law's plant-state entries hold the prediction x(k|k-1) (fixed_law's notes)
    kind = "predicted" if estimator.full_state else "estimate"
    states = [f"{label}.{kind}" for label in plant.state_labels]
    if estimator.disturbance == "per_output":
        states += [f"{s.name}.{k}_disturbance" for s, k in zip(plant.measured, estimator.disturbances, strict=True)]
    else:
        source = {"output": plant.measured, "input": plant.inputs, "none": ()}[estimator.disturbance]
        states += [f"{s.name}.{estimator.disturbance}_disturbance" for s in source]
    states += [f"{s.name}.previous" for s in plant.inputs]
    return LawLabels(inputs=inputs, outputs=outputs, states=states)


def _labelled(values: NDArray[np.float64], rows: list[str], columns: list[str]) -> LabelledMatrix:
    return LabelledMatrix(rows=rows, columns=columns, values=values.tolist())


def _table(matrix: LabelledMatrix) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")
    writer.writerow(["", *(text_cell(c) for c in matrix.columns)])
    for name, row in zip(matrix.rows, matrix.values, strict=True):
        writer.writerow([text_cell(name), *(repr(v) for v in row)])
    return buffer.getvalue()


def _sum(terms: list[tuple[float, str]]) -> str:
    text = ""
    for value, name in terms:
        if value == 0.0:
            continue
        sign = "-" if value < 0 else "+"
        magnitude = f"{abs(value):.10g}"
        if not text:
            text = f"{'-' if value < 0 else ''}{magnitude} {name}"
        else:
            text += f" {sign} {magnitude} {name}"
    return text or "0"


def _constant(text: str, value: float) -> str:
    """``text`` with a constant term added (nothing when it is zero)."""
    if value == 0.0:
        return text
    if text == "0":
        return f"{value:.10g}"
    return f"{text} {'-' if value < 0 else '+'} {abs(value):.10g}"


def difference_equations(
    law: FixedLaw,
    labels: LawLabels,
    *,
    input_offset: NDArray[np.float64] | None = None,
    output_offset: NDArray[np.float64] | None = None,
) -> list[str]:
    """The split form written out: ``u(k)`` of each input, then ``s(k+1)`` of each state.

    With the offsets ``w0`` (nw,) and ``u0`` (m,) of an operating point the equations are in
    absolute signals, with the constants ``u0 - Du w0`` and ``-(Bp w0 + Bu u0)`` (module notes).
    """
    w0 = np.zeros(law.signal_update.shape[1]) if input_offset is None else input_offset
    u0 = np.zeros(law.inputs) if output_offset is None else output_offset
    input_constant = u0 - law.input_direct @ w0
    state_constant = -(law.signal_update @ w0 + law.applied_update @ u0)
    state = [f"{name}(k)" for name in labels.states]
    signal = [f"{s.name}(k)" for s in labels.inputs]
    applied = [f"{s.name}(k)" for s in labels.outputs[: law.inputs]]
    out = []
    for i, name in enumerate(applied):
        terms = [*zip(law.input_state[i], state, strict=True), *zip(law.input_direct[i], signal, strict=True)]
        out.append(f"{name} = {_constant(_sum(terms), float(input_constant[i]))}")
    previous = labels.states[law.estimates :]
    for i, name in enumerate(applied):
        out.append(
            f"{labels.outputs[law.inputs + i].name}(k) = {_constant(f'{name} - {previous[i]}(k)', -float(u0[i]))}"
        )
    for i, name in enumerate(labels.states):
        terms = [
            *zip(law.state_update[i], state, strict=True),
            *zip(law.signal_update[i], signal, strict=True),
            *zip(law.applied_update[i], applied, strict=True),
        ]
        out.append(f"{name}(k+1) = {_constant(_sum(terms), float(state_constant[i]))}")
    return out


def _input_limits(
    inputs: ExportInputs, u0: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]] | None:
    """``input_min``, ``input_max`` (absolute: the deviations plus ``u0``) and ``move_max``; ``None`` without limits."""
    limits = inputs.design.limits
    if limits is None:
        return None
    return limits.input_min + u0, limits.input_max + u0, limits.move_max


def _limits(inputs: ExportInputs, u0: NDArray[np.float64]) -> LawLimits | None:
    found = _input_limits(inputs, u0)
    if found is None:
        return None

    def listed(values: NDArray[np.float64]) -> list[float | None]:
        return [float(v) if np.isfinite(v) else None for v in values]

    low, high, step = found
    return LawLimits(input_min=listed(low), input_max=listed(high), move_max=listed(step))


def export_response(request: ExportRequest, inputs: ExportInputs, outcome: ExportOutcome) -> ExportResponse:
    """Turn the law into the ``state_space`` answer."""
    plant = inputs.design.plant
    law = outcome.law
    labels = law_labels(plant, outcome.estimator, targets=outcome.law.targets > 0)
    w0, u0 = law_offsets(plant, inputs.point, law)
    system = law.system
    states = labels.states
    columns = [s.name for s in labels.inputs]
    rows = [s.name for s in labels.outputs]
    moves = rows[: law.inputs]
    matrices = {
        "a": _labelled(system.a, states, states),
        "b": _labelled(system.b, states, columns),
        "c": _labelled(system.c, rows, states),
        "d": _labelled(system.d, rows, columns),
        "state_update": _labelled(law.state_update, states, states),
        "signal_update": _labelled(law.signal_update, states, columns),
        "applied_update": _labelled(law.applied_update, states, moves),
        "prediction": _labelled(law.prediction, [s.name for s in labels.inputs[: law.measured]], states),
        "input_offset": _labelled(w0[:, None], columns, ["offset"]),
        "output_offset": _labelled(np.concatenate([u0, np.zeros(law.inputs)])[:, None], rows, ["offset"]),
    }
    return ExportResponse(
        format="state_space",
        sample_time=plant.sample_time,
        inputs=labels.inputs,
        outputs=labels.outputs,
        states=states,
        equations=difference_equations(law, labels, input_offset=w0, output_offset=u0),
        tables=LawTables(**{name: _table(matrix) for name, matrix in matrices.items()}),
        limits=_limits(inputs, u0),
        warnings=[WarningReport(code=w.code, message=w.message) for w in outcome.design.warnings],
        fingerprint=design_fingerprint(request),
        a=matrices["a"],
        b=matrices["b"],
        c=matrices["c"],
        d=matrices["d"],
        state_update=matrices["state_update"],
        signal_update=matrices["signal_update"],
        applied_update=matrices["applied_update"],
        prediction=matrices["prediction"],
        input_offset=w0.tolist(),
        output_offset=[*u0.tolist(), *([0.0] * law.inputs)],
    )


def block_source(request: ExportRequest, inputs: ExportInputs, outcome: ExportOutcome, *, generated: str) -> str:
    """The law as an IEC 61131-3 function block (:mod:`service.pipeline.structured_text`)."""
    plant = inputs.design.plant
    labels = law_labels(plant, outcome.estimator, targets=outcome.law.targets > 0)
    est = outcome.estimator
    w0, u0 = law_offsets(plant, inputs.point, outcome.law)
    limits = _input_limits(inputs, u0)
    return structured_text(
        outcome.law,
        inputs=labels.inputs,
        outputs=labels.outputs,
        states=labels.states,
        about=BlockText(
            block_name=inputs.block_name,
            fingerprint=design_fingerprint(request),
            generated=generated,
            sample_time=plant.sample_time,
            estimator=f"{est.kind}, disturbance model {est.disturbance}",
            warnings=tuple((w.code, w.message) for w in outcome.design.warnings),
        ),
        input_min=None if limits is None else limits[0],
        input_max=None if limits is None else limits[1],
        move_max=None if limits is None else limits[2],
        input_offset=w0 if inputs.point is not None else None,
        output_offset=u0 if inputs.point is not None else None,
    )


def run_export(request: ExportRequest, caps: Caps, generated: str) -> ExportResponse | str:
    """Check, design and export: the whole of POST /design/export without HTTP.

    Parameters
    ----------
    generated : str
        The date written in a Structured Text header (ISO 8601, ``YYYY-MM-DD``).

    Returns
    -------
    ExportResponse or str
        The ``state_space`` answer, or the Structured Text source.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    inputs = check_export_request(request, caps)
    outcome = compute_export(inputs)
    if inputs.format == "structured_text":
        return block_source(request, inputs, outcome, generated=generated)
    return export_response(request, inputs, outcome)
