"""From a validated /design request to solver arrays, and from the solver's result back."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest
from service.schemas.common import Caps, check_weight, pointer
from service.schemas.design import (
    ClosedLoopReport,
    DesignRequest,
    DesignResponse,
    GainReport,
    HessianReport,
    PoleReport,
    WarningReport,
)
from service.schemas.fingerprint import fingerprint
from service.schemas.model import DiscretePlant, plant_arrays
from service.solver.design import ControllerDesign, design_controller

__all__ = ["DesignInputs", "check_design_request", "design_response", "run_design"]


@dataclass(frozen=True)
class DesignInputs:
    """A /design request after every check: arrays and integers for the solver."""

    plant: DiscretePlant
    output_weight: NDArray[np.float64]
    move_weight: NDArray[np.float64]
    prediction: int
    control: int
    first_penalized: int


def check_design_request(request: DesignRequest, caps: Caps) -> DesignInputs:
    """Check everything the field types alone cannot: sizes that must agree, and the caps.

    Raises
    ------
    InvalidRequest
        With one FieldProblem per broken rule, each naming its field by JSON pointer.
    """
    plant, problems = plant_arrays(request.model, caps)
    h = request.horizons
    if h.control > h.prediction:
        problems.append(
            FieldProblem(
                pointer("horizons", "control"),
                f"the control horizon ({h.control}) must not exceed the prediction horizon ({h.prediction})",
            )
        )
    if h.first_penalized > h.prediction:
        problems.append(
            FieldProblem(
                pointer("horizons", "first_penalized"),
                f"the first penalized step ({h.first_penalized}) must not exceed the prediction "
                f"horizon ({h.prediction})",
            )
        )
    if h.prediction > caps.max_prediction_horizon:
        problems.append(
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the prediction horizon {h.prediction} exceeds this service's cap of "
                f"{caps.max_prediction_horizon} samples",
            )
        )
    if plant is None:
        raise InvalidRequest(problems)
    n, m, p = plant.states, plant.inputs, plant.outputs
    q, found = check_weight(request.weights.output, ("weights", "output"), size=p, what="output weight")
    problems += found
    r, found = check_weight(request.weights.move, ("weights", "move"), size=m, what="move weight")
    problems += found
    if q is not None and not np.any(q):
        problems.append(
            FieldProblem(
                pointer("weights", "output"),
                "every output weight is zero, so no output is controlled; give at least one a positive weight",
            )
        )
    if not problems:
        penalized = h.prediction - h.first_penalized + 1
        hessian_size = h.control * m
        if hessian_size > caps.max_hessian_size:
            problems.append(
                FieldProblem(
                    pointer("horizons", "control"),
                    f"the Hessian would be {hessian_size} x {hessian_size} (control horizon {h.control} "
                    f"x {m} inputs); this service accepts at most {caps.max_hessian_size}",
                )
            )
        elif penalized * p * (n + m + hessian_size) > caps.max_prediction_entries:
            problems.append(
                FieldProblem(
                    pointer("horizons", "prediction"),
                    f"the prediction matrices would hold {penalized * p * (n + m + hessian_size):,} "
                    f"numbers; this service accepts at most {caps.max_prediction_entries:,}. Shorten "
                    f"the prediction or control horizon",
                )
            )
        elif m * penalized * p > caps.max_response_entries:
            problems.append(
                FieldProblem(
                    pointer("horizons", "prediction"),
                    f"the horizon gain would hold {m * penalized * p:,} numbers; this service "
                    f"returns at most {caps.max_response_entries:,}",
                )
            )
    if problems:
        raise InvalidRequest(problems)
    assert q is not None and r is not None
    return DesignInputs(
        plant=plant,
        output_weight=q,
        move_weight=r,
        prediction=h.prediction,
        control=h.control,
        first_penalized=h.first_penalized,
    )


def design_response(request: DesignRequest, design: ControllerDesign) -> DesignResponse:
    """Turn the solver's result into the response model."""
    gain = design.gain
    loop = design.loop
    return DesignResponse(
        gain=GainReport(
            horizon=gain.horizon.tolist(),
            state=gain.state.tolist(),
            previous_input=gain.previous_input.tolist(),
            setpoint=gain.setpoint.tolist(),
        ),
        hessian=HessianReport(
            condition_number=design.hessian.condition_number,
            smallest_eigenvalue=design.hessian.smallest_eigenvalue,
            largest_eigenvalue=design.hessian.largest_eigenvalue,
            size=design.hessian.matrix.shape[0],
        ),
        closed_loop=ClosedLoopReport(
            poles=[PoleReport(real=float(z.real), imag=float(z.imag)) for z in loop.poles],
            spectral_radius=loop.spectral_radius,
            stable=loop.stable,
        ),
        warnings=[WarningReport(code=w.code, message=w.message) for w in design.warnings],
        fingerprint=fingerprint(request),
    )


def run_design(request: DesignRequest, caps: Caps) -> DesignResponse:
    """Check, design and report: the whole of POST /design without HTTP.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    inputs = check_design_request(request, caps)
    design = design_controller(
        inputs.plant.a,
        inputs.plant.b,
        inputs.plant.c,
        output_weight=inputs.output_weight,
        move_weight=inputs.move_weight,
        prediction=inputs.prediction,
        control=inputs.control,
        first_penalized=inputs.first_penalized,
    )
    return design_response(request, design)
