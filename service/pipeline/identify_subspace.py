"""The answer of POST /identify for a subspace fit: a discrete state-space model for /design."""

from __future__ import annotations

import numpy as np
import scipy.signal

from service.pipeline.identify import (
    STEP_RESPONSE_SAMPLES,
    IdentifyInputs,
    correlated_residuals,
    fitted_operating_point,
)
from service.schemas.design import WarningReport
from service.schemas.identify import (
    CorrelationReport,
    CrossCorrelationReport,
    DataReport,
    IdentifyResponse,
    OutputFitReport,
    ParameterReport,
    SegmentFitReport,
    StepSeriesReport,
    SubspaceReport,
)
from service.schemas.model import StateSpaceModel
from service.schemas.signals import SignalTag
from service.solver.identification.diagnostics import fit_measures, residual_correlations
from service.solver.identification.subspace import SubspaceModel

__all__ = ["subspace_response"]

METHOD = "PO-MOESP (Verhaegen 1994), own implementation"


def _segment(y: np.ndarray, fitted: np.ndarray, used: np.ndarray) -> SegmentFitReport:
    fit, r2 = fit_measures(y, fitted, used)
    return SegmentFitReport(
        samples=int(used.sum()),
        nrmse_fit_percent=float(fit) if np.isfinite(fit) else None,
        r_squared=float(r2) if np.isfinite(r2) else None,
    )


def subspace_response(inputs: IdentifyInputs, model: SubspaceModel, data: DataReport) -> IdentifyResponse:
    """Fits, residual checks and step responses of the subspace model over the whole record."""
    ts = inputs.sample_time
    column_tags = [*inputs.inputs, *inputs.disturbances]
    m, p, n = len(inputs.inputs), len(inputs.outputs), model.order
    deviations = inputs.columns - inputs.operating_point
    count = deviations.shape[0]
    system = (model.a, model.b, model.c, np.zeros((p, model.b.shape[1])), 1.0)
    _, fitted, _ = scipy.signal.dlsim(system, deviations, x0=model.initial_state)
    fitted = fitted.reshape(count, p) + model.offset
    estimation = np.zeros(count, dtype=bool)
    estimation[: inputs.estimation] = True
    fits = []
    correlated: list[WarningReport] = []
    for i, tag in enumerate(inputs.outputs):
        y = inputs.outputs_data[:, i]
        present = np.isfinite(y)
        residuals = np.where(present, y - fitted[:, i], 0.0)
        used = estimation & present
        auto, cross = residual_correlations(residuals, used, deviations, lags=inputs.lags)
        correlated += correlated_residuals(
            tag, auto, remedy=f"try a higher order than {n}: give order, guided by subspace.singular_values"
        )
        fits.append(
            OutputFitReport(
                output=tag,
                estimation=_segment(y, fitted[:, i], used),
                validation=_segment(y, fitted[:, i], ~estimation & present) if inputs.estimation < count else None,
                residual_std=float(np.std(residuals[used])),
                offset=ParameterReport(
                    name="offset", estimate=float(model.offset[i]), standard_error=None, at_bound=False
                ),
                autocorrelation=CorrelationReport(
                    lags=auto.lags.tolist(), values=auto.values.tolist(), bound=auto.bound, outside=auto.outside
                ),
                cross_correlation=[
                    CrossCorrelationReport(
                        input=t, lags=c.lags.tolist(), values=c.values.tolist(), bound=c.bound, outside=c.outside
                    )
                    for t, c in zip(column_tags, cross, strict=True)
                ],
            )
        )
    radius = float(np.max(np.abs(np.linalg.eigvals(model.a)))) if n else 0.0
    longest = STEP_RESPONSE_SAMPLES
    settle = (
        longest if radius >= 1.0 else int(min(longest, max(20, np.ceil(5.0 / max(-np.log(max(radius, 1e-12)), 1e-9)))))
    )
    steps = []
    for j, column in enumerate(column_tags):
        u = np.zeros((settle + 1, model.b.shape[1]))
        u[:, j] = 1.0
        _, response, _ = scipy.signal.dlsim(system, u)
        response = response.reshape(settle + 1, p)
        for i, tag in enumerate(inputs.outputs):
            steps.append(
                StepSeriesReport(
                    output=tag, input=column, time=(ts * np.arange(settle + 1)).tolist(), value=response[:, i].tolist()
                )
            )
    warnings = list(inputs.warnings) + correlated
    if radius >= 1.0:
        warnings.append(
            WarningReport(
                code="unstable_model",
                message=f"the subspace model has a pole at |z| = {radius:.4g}: check the order and the data "
                "(an integrating output gives a pole near 1)",
            )
        )
    state_space = StateSpaceModel(
        kind="state_space",
        a=model.a.tolist(),
        b=model.b[:, :m].tolist(),
        c=model.c.tolist(),
        b_disturbance=model.b[:, m:].tolist() if inputs.disturbances else None,
        time_domain="discrete",
        sample_time=ts,
        inputs=[SignalTag(name=t) for t in inputs.inputs],
        outputs=[SignalTag(name=t) for t in inputs.outputs],
        disturbances=[SignalTag(name=t) for t in inputs.disturbances] if inputs.disturbances else None,
        operating_point=fitted_operating_point(inputs, [float(v) for v in model.offset]),
    )
    return IdentifyResponse(
        model=state_space,
        subspace=SubspaceReport(
            method=METHOD, order=n, block_rows=model.block_rows, singular_values=model.singular_values.tolist()
        ),
        pairs=[],
        fits=fits,
        step_responses=steps,
        data=data,
        warnings=warnings,
    )
