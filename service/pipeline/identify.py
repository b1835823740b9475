"""POST /identify: check the plant-test data, fit each output, answer with a /design model.

``check_identify -> IdentifyInputs``, ``compute_identify -> IdentifyOutcome``,
``identify_response``; ``run_identify`` does all three.  Every check names its field by
JSON pointer; the solver sees only clean arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.caps import Caps
from service.pipeline.problems import pointer
from service.schemas.design import WarningReport
from service.schemas.identify import (
    CorrelationReport,
    CrossCorrelationReport,
    DataReport,
    IdentifyRequest,
    IdentifyResponse,
    OutputFitReport,
    PairFitReport,
    ParameterReport,
    SegmentFitReport,
    StepSeriesReport,
    TagDataReport,
)
from service.schemas.model import TransferElementModel, TransferMatrixModel
from service.schemas.signals import OperatingPoint, SignalTag
from service.solver.identification.data import hold_missing, resample_held, resample_interpolated, sample_grid
from service.solver.identification.diagnostics import (
    Z99,
    Correlation,
    find_outliers,
    fit_measures,
    frozen_runs,
    moves_correlation,
    outliers_of_fit,
    residual_correlations,
)
from service.solver.identification.least_squares import OutputFit, PairSpec, fit_output
from service.solver.identification.process_models import STRUCTURES, element_of, step_values
from service.solver.identification.subspace import SubspaceModel, moesp

__all__ = [
    "MIN_SAMPLES",
    "STEP_RESPONSE_SAMPLES",
    "WORK_PER_PARAMETER",
    "IdentifyInputs",
    "IdentifyOutcome",
    "check_identify",
    "compute_identify",
    "fitted_operating_point",
    "identify_response",
    "identify_work",
    "run_identify",
]

#: Fewest samples a fit takes (after the held-out segment).
MIN_SAMPLES = 20
#: Longest step response an identification returns per pair, in samples.
STEP_RESPONSE_SAMPLES = 2000
#: Simulated samples per fitted parameter and data sample, over the three starts, their
#: iterations and Jacobians (a rough count; the work cap multiplies by it).
WORK_PER_PARAMETER = 2_000
#: An input whose range is below this share of its magnitude (and of 1e-12) did not move.
STILL = 1e-9
#: A gain whose standard error exceeds this share of it counts as not identified.
WEAK_GAIN = 0.25
#: An output reading exactly one value this many samples in a row is a candidate frozen sensor.
FROZEN_SAMPLES = 10
#: Inputs whose moves correlate more than this are reported.
CORRELATED = 0.9
#: Structures with a simpler variant of one lag fewer.
LAGGED = frozenset({"second_order_dead_time", "integrating_first_order_dead_time"})
#: Integrating variant of each structure (same order).
INTEGRATING = {
    "first_order_dead_time": "integrating_dead_time",
    "second_order_dead_time": "integrating_first_order_dead_time",
}


@dataclass(frozen=True)
class ColumnNote:
    """What was found in one column of the data."""

    tag: str
    missing: NDArray[np.int64]
    outliers: NDArray[np.int64]
    handling: str
    frozen: NDArray[np.int64] = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    """Samples of an output's stretches that read one value (a frozen sensor), left out."""


@dataclass(frozen=True)
class IdentifyInputs:
    """The checked data as arrays, with what was found in it."""

    sample_time: float
    inputs: tuple[str, ...]
    disturbances: tuple[str, ...]
    outputs: tuple[str, ...]
    columns: NDArray[np.float64]
    """Inputs then disturbances, ``(N, M)``, absolute values, missing samples held."""
    operating_point: NDArray[np.float64]
    """Of the columns: their values at the first sample, ``(M,)``."""
    structure: str
    order: int | None
    block_rows: int
    outputs_data: NDArray[np.float64]
    """``(N, p)``, ``nan`` where missing or an outlier."""
    outputs_measured: NDArray[np.float64]
    """``(N, p)``, ``nan`` where missing only (the outliers' own values kept)."""
    outlier_limit: float | None
    pairs: tuple[tuple[PairSpec, ...], ...]
    """Per output, the pairs to fit."""
    integrating: tuple[bool, ...]
    estimation: int
    """Samples of the fit (the first ones); the rest is held out."""
    max_dead_time: float
    settling_samples: int
    detrend: bool
    lags: int
    notes: tuple[ColumnNote, ...]
    resampling: str | None
    warnings: tuple[WarningReport, ...]
    moved_with: dict[str, tuple[str, ...]] = field(default_factory=dict)
    """Per column, the columns whose moves it followed (``correlated_inputs``)."""


@dataclass(frozen=True)
class IdentifyOutcome:
    """The fits per output, or the subspace model."""

    fits: tuple[OutputFit, ...]
    warnings: tuple[WarningReport, ...] = field(default=())
    subspace: SubspaceModel | None = None
    checked: IdentifyInputs | None = None
    """The inputs with the outliers as the fitted models judged them (None: as checked)."""


def identify_work(samples: int, parameters: int) -> int:
    """Estimated work of a fit: samples x parameters x :data:`WORK_PER_PARAMETER`."""
    return samples * parameters * WORK_PER_PARAMETER


def _tag_problems(request: IdentifyRequest) -> list[FieldProblem]:
    problems: list[FieldProblem] = []
    seen: dict[str, str] = {}
    for group in ("inputs", "outputs", "disturbances"):
        for i, tag in enumerate(getattr(request, group)):
            if tag in seen:
                problems.append(FieldProblem(pointer(group, i), f"tag {tag!r} is listed twice (also in {seen[tag]})"))
                continue
            seen[tag] = group
            if tag not in request.data:
                problems.append(FieldProblem(pointer(group, i), f"tag {tag!r} has no column in data"))
    for i, tag in enumerate(request.integrating):
        if tag not in request.outputs:
            problems.append(FieldProblem(pointer("integrating", i), f"{tag!r} is not one of the outputs"))
    columns = set(request.inputs) | set(request.disturbances)
    for i, pair in enumerate(request.pairs):
        if pair.output not in request.outputs:
            problems.append(FieldProblem(pointer("pairs", i, "output"), f"{pair.output!r} is not one of the outputs"))
        if pair.input not in columns:
            problems.append(
                FieldProblem(pointer("pairs", i, "input"), f"{pair.input!r} is not an input or a disturbance")
            )
        integrating = pair.output in request.integrating
        if pair.structure != "none" and pair.structure.startswith("integrating") != integrating:
            what = "is listed as integrating" if integrating else "is not listed as integrating"
            problems.append(
                FieldProblem(
                    pointer("pairs", i, "structure"),
                    f"{pair.output!r} {what}; its pairs take {'an' if integrating else 'a non-'}integrating structure",
                )
            )
    return problems


def _columns(
    request: IdentifyRequest, caps: Caps
) -> tuple[dict[str, NDArray[np.float64]], str | None, list[FieldProblem]]:
    """The used columns on the sample time: resampled when a time column says so."""
    used = [*request.inputs, *request.disturbances, *request.outputs]
    lengths = {tag: len(request.data[tag]) for tag in used}
    n = max(lengths.values())
    problems = [
        FieldProblem(pointer("data", tag), f"{length} values; the longest column has {n}")
        for tag, length in lengths.items()
        if length != n
    ]
    if problems:
        return {}, None, problems
    raw = {tag: np.array([np.nan if v is None else v for v in request.data[tag]], dtype=float) for tag in used}
    ts = float(request.sample_time)
    if request.time is None:
        if n > caps.max_identify_samples:
            return (
                {},
                None,
                [
                    FieldProblem(
                        pointer("data"), f"{n} samples; this service accepts at most {caps.max_identify_samples}"
                    )
                ],
            )
        return raw, None, []
    time = np.array(request.time, dtype=float)
    if time.size != n:
        return {}, None, [FieldProblem(pointer("time"), f"{time.size} time stamps for {n} samples")]
    steps = np.diff(time)
    if np.any(steps <= 0):
        k = int(np.argmax(steps <= 0)) + 1
        return {}, None, [FieldProblem(pointer("time", k), "time stamps must increase strictly")]
    if np.allclose(steps, ts, rtol=1e-6, atol=0.0):
        return raw, None, []
    grid = sample_grid(time, ts)
    if grid.size > caps.max_identify_samples:
        return (
            {},
            None,
            [
                FieldProblem(
                    pointer("time"),
                    f"{grid.size} samples at this sample time; this service accepts at most {caps.max_identify_samples}",
                )
            ],
        )
    out = {}
    for tag in used:
        if tag in request.outputs:
            out[tag] = resample_interpolated(time, raw[tag], grid, sample_time=ts)
        else:
            out[tag] = resample_held(time, raw[tag], grid)
    median = float(np.median(steps))
    how = (
        f"{n} samples {median:g} apart (median{', irregular' if not np.allclose(steps, median, rtol=1e-3) else ''}) put "
        f"on {grid.size} instants {ts:g} apart: inputs and disturbances take the last value at or before each "
        f"instant (zero-order hold), outputs the linear interpolation between the samples on either side "
        f"(missing across a missing sample or a gap longer than two sample times)"
    )
    return out, how, []


def _output_note(
    tag: str,
    missing: NDArray[np.int64],
    outliers: NDArray[np.int64],
    limit: float | None,
    *,
    frozen: NDArray[np.int64] | None = None,
    judged: bool = False,
) -> tuple[ColumnNote, WarningReport | None]:
    """What was found in an output's column and done with it, and its ``samples_left_out`` warning
    (``judged``: the outliers and frozen stretches were confirmed on the fitted model's residuals)."""
    frozen = np.zeros(0, dtype=np.int64) if frozen is None else frozen
    parts = []
    if missing.size:
        parts.append(f"{missing.size} missing")
    if outliers.size:
        parts.append(
            f"{outliers.size} outliers (beyond {limit:g} robust standard deviations from the running median"
            + (" and from the fitted model)" if judged else ")")
        )
    if frozen.size:
        parts.append(
            f"{frozen.size} frozen (the same value {FROZEN_SAMPLES} or more samples in a row, from sample "
            f"{int(frozen[0])}, where the fitted model moves: a stuck sensor or a gap filled by the historian)"
        )
    note = ColumnNote(tag, missing, outliers, "left out of the fit" if parts else "none needed", frozen)
    if not parts:
        return note, None
    return note, WarningReport(
        code="samples_left_out", message=f"{tag}: {' and '.join(parts)} samples left out of the fit"
    )


def check_identify(request: IdentifyRequest, caps: Caps) -> IdentifyInputs:
    """Check the request against itself and the caps; clean the data and say how.

    Raises
    ------
    InvalidRequest
        Naming each field by JSON pointer.
    """
    problems = _tag_problems(request)
    if problems:
        raise InvalidRequest(problems)
    data, resampling, problems = _columns(request, caps)
    if problems:
        raise InvalidRequest(problems)
    ts = float(request.sample_time)
    column_tags = [*request.inputs, *request.disturbances]
    n = data[request.outputs[0]].size
    held_out = int(np.floor(n * request.validation.fraction)) if request.validation else 0
    estimation = n - held_out
    if estimation < MIN_SAMPLES:
        raise InvalidRequest(
            [FieldProblem(pointer("data"), f"{estimation} samples to fit; at least {MIN_SAMPLES} are needed")]
        )
    lags = request.correlation_lags
    if lags >= estimation and "correlation_lags" not in request.model_fields_set:
        # the default of 20 on a short record (20 samples is the least a fit takes): a quarter of
        # the samples (common practice), not a refusal that names a field the client never set
        lags = max(1, estimation // 4)
    if lags >= estimation:
        raise InvalidRequest(
            [
                FieldProblem(
                    pointer("correlation_lags"),
                    f"{request.correlation_lags} lags for {estimation} samples to fit: the residual checks need "
                    f"fewer lags than samples (a quarter of the samples or fewer is common practice)",
                )
            ]
        )
    notes: list[ColumnNote] = []
    warnings: list[WarningReport] = []
    columns = np.zeros((n, len(column_tags)))
    still: set[str] = set()
    for j, tag in enumerate(column_tags):
        values = data[tag]
        missing = np.nonzero(~np.isfinite(values))[0]
        if missing.size == n:
            raise InvalidRequest([FieldProblem(pointer("data", tag), "every value is missing")])
        held, _ = hold_missing(values)
        columns[:, j] = held
        handling = "held at the last valid value (the first valid one before it)" if missing.size else "none needed"
        notes.append(ColumnNote(tag, missing, np.zeros(0, dtype=np.int64), handling))
        if missing.size:
            warnings.append(
                WarningReport(
                    code="missing_samples",
                    message=f"{tag} has {missing.size} missing samples; each holds the last valid value",
                )
            )
        part = held[:estimation]
        # relative to the column's own size, so its unit cannot make it still (a floor of 1e-12
        # had called an input in units where it reads 1e-13 still however it moved)
        if np.ptp(part) <= STILL * float(np.max(np.abs(part))):
            still.add(tag)
    operating_point = columns[0].copy()
    outputs = np.zeros((n, len(request.outputs)))
    measured = np.zeros_like(outputs)
    for i, tag in enumerate(request.outputs):
        values = data[tag].copy()
        missing = np.nonzero(~np.isfinite(values))[0]
        if n - missing.size < MIN_SAMPLES:
            raise InvalidRequest(
                [
                    FieldProblem(
                        pointer("data", tag),
                        f"only {n - missing.size} values present; at least {MIN_SAMPLES} are needed",
                    )
                ]
            )
        outliers = (
            np.nonzero(find_outliers(values, limit=request.outlier_limit))[0]
            if request.outlier_limit is not None
            else np.zeros(0, dtype=np.int64)
        )
        measured[:, i] = values
        values = values.copy()
        values[outliers] = np.nan
        outputs[:, i] = values
        note, warning = _output_note(tag, missing, outliers, request.outlier_limit)
        notes.append(note)
        if warning is not None:
            warnings.append(warning)
    overrides = {(p.output, p.input): p.structure for p in request.pairs}
    pairs: list[tuple[PairSpec, ...]] = []
    parameters = 0
    block_rows = 0
    if request.structure == "subspace":
        missing_counts = {note.tag: int(np.sum(note.missing < estimation)) for note in notes}
        block_rows, parameters = _subspace_checks(request, column_tags, outputs, estimation, still, missing_counts)
    for tag in request.outputs if request.structure != "subspace" else ():
        integrating = tag in request.integrating
        default = INTEGRATING[request.structure] if integrating else request.structure
        row = []
        for j, column in enumerate(column_tags):
            structure = overrides.get((tag, column), default)
            if structure == "none":
                continue
            if column in still:
                warnings.append(
                    WarningReport(
                        code="input_did_not_move",
                        message=f"input {column} did not move during the test, so its effect on {tag} cannot be "
                        f"identified; the pair is left out of the model (null)",
                    )
                )
                continue
            row.append(PairSpec(j, structure))
            parameters += len(STRUCTURES[structure])
        if not row:
            i = request.outputs.index(tag)
            raise InvalidRequest(
                [
                    FieldProblem(
                        pointer("outputs", i), f"no input moved during the test, so nothing acts on {tag} to fit"
                    )
                ]
            )
        pairs.append(tuple(row))
        own = sum(len(STRUCTURES[spec.structure]) for spec in row) + (2 if request.detrend else 1)
        parameters += 2 if request.detrend else 1
        i = request.outputs.index(tag)
        count = int(np.isfinite(outputs[:estimation, i]).sum())
        if count <= own:
            # no degree of freedom left: any such fit passes through the data, its fit figures say
            # nothing and its standard errors are undetermined
            raise InvalidRequest(
                [
                    FieldProblem(
                        pointer("data", tag),
                        f"{count} samples of {tag} to fit (missing values and outliers left out) for {own} "
                        f"parameters (its {len(row)} pairs, the offset{' and the drift' if request.detrend else ''}): "
                        f"a fit needs more samples than parameters, and many more to mean something. Give a longer "
                        f"record or leave pairs out (structure 'none')"
                        + (
                            ", or pairs with one lag fewer (first_order_dead_time, integrating_dead_time)"
                            if any(spec.structure in LAGGED for spec in row)
                            else ""
                        ),
                    )
                ]
            )
    work = identify_work(estimation, parameters)
    if work > caps.max_identify_work:
        raise InvalidRequest(
            [
                FieldProblem(
                    pointer("data"),
                    f"fitting {parameters} parameters to {estimation} samples is estimated at {work:.3g} units of work; "
                    f"this service accepts at most {caps.max_identify_work:.3g}. Use a longer sample time, a shorter "
                    f"record or fewer pairs",
                )
            ]
        )
    moves = np.diff(columns[:estimation], axis=0)
    moved_with: dict[str, list[str]] = {}
    # shifted by up to the longest dead time, one input's response passes for the other's
    longest = float(request.max_dead_time) if request.max_dead_time is not None else estimation * ts / 3.0
    shift = int(min(np.ceil(longest / ts), estimation - 2)) if request.structure != "subspace" else 0
    for a in range(len(column_tags)):
        for b in range(a + 1, len(column_tags)):
            if column_tags[a] in still or column_tags[b] in still:
                continue
            r, lag = moves_correlation(moves[:, a], moves[:, b], max_lag=shift)
            if abs(r) > CORRELATED:
                moved_with.setdefault(column_tags[a], []).append(column_tags[b])
                moved_with.setdefault(column_tags[b], []).append(column_tags[a])
                pair = (
                    f"inputs {column_tags[a]} and {column_tags[b]} moved together (correlation of their moves {r:.2f}"
                )
                if lag == 0:
                    text = f"{pair}); their separate effects are poorly determined: move them independently"
                else:  # a caution: a shift longer than the dead times can tell apart still separates them
                    text = (
                        f"{pair}, {column_tags[b]} {abs(lag)} samples {'after' if lag > 0 else 'before'} "
                        f"{column_tags[a]}); a fit can trade the one's gain and dead time for the other's: check "
                        f"their standard errors, and move them independently"
                    )
                warnings.append(WarningReport(code="correlated_inputs", message=text))
    record = estimation * ts
    if request.structure != "subspace" and request.max_dead_time is not None and float(request.max_dead_time) >= record:
        raise InvalidRequest(
            [
                FieldProblem(
                    pointer("max_dead_time"),
                    f"{float(request.max_dead_time):g} is not shorter than the record to fit ({estimation} samples "
                    f"of {ts:g}, {record:g} in the time unit): a dead time that long cannot show in the data. Give "
                    f"a shorter one (the default is a third of the record) or a longer test",
                )
            ]
        )
    max_dead = float(request.max_dead_time) if request.max_dead_time is not None else record / 3.0
    settling = float(request.settling_time) if request.settling_time is not None else record / 4.0
    return IdentifyInputs(
        structure=request.structure,
        order=request.order,
        block_rows=block_rows,
        sample_time=ts,
        inputs=tuple(request.inputs),
        disturbances=tuple(request.disturbances),
        outputs=tuple(request.outputs),
        columns=columns,
        operating_point=operating_point,
        outputs_data=outputs,
        outputs_measured=measured,
        outlier_limit=request.outlier_limit,
        pairs=tuple(pairs),
        integrating=tuple(tag in request.integrating for tag in request.outputs),
        estimation=estimation,
        max_dead_time=max_dead,
        # the fit never looks further than the record: a settling time of more samples than a
        # float holds (a sample time near 1e-308) is the record's length
        settling_samples=max(2, int(min(np.ceil(settling / ts), estimation))),
        detrend=request.detrend,
        lags=lags,
        notes=tuple(notes),
        resampling=resampling,
        warnings=tuple(warnings),
        moved_with={tag: tuple(others) for tag, others in moved_with.items()},
    )


def _subspace_checks(
    request: IdentifyRequest,
    column_tags: list[str],
    outputs: NDArray[np.float64],
    estimation: int,
    still: set[str],
    missing_counts: dict[str, int],
) -> tuple[int, int]:
    """Block rows and a parameter count of a subspace fit; every output sample must be there.

    ``missing_counts``: per output, its missing samples among those to fit (the other gaps are outliers).
    """
    problems = []
    for i, tag in enumerate(request.outputs):
        gaps = np.nonzero(~np.isfinite(outputs[:estimation, i]))[0]
        if gaps.size:
            missing = missing_counts[tag]
            if missing == 0:  # outliers only: the check may be what stands in the way
                what = (
                    f"{gaps.size} outliers of the outlier check; review them in data.tags, or switch the check off "
                    f"(outlier_limit null, 'none' in a query) when they are the plant's own moves"
                )
            elif missing == gaps.size:
                what = f"{gaps.size} missing"
            else:
                what = f"{missing} missing and {gaps.size - missing} outliers"
            problems.append(
                FieldProblem(
                    pointer("data", tag, int(gaps[0])),
                    f"the subspace fit needs every sample of the outputs, and {tag} misses {what}, from here "
                    f"on: cut the record, or fit first_order_dead_time pairs",
                )
            )
    for tag in column_tags:
        if tag in still:
            problems.append(
                FieldProblem(
                    pointer("data", tag), f"{tag} did not move during the test; leave it out of a subspace fit"
                )
            )
    width = len(column_tags) + len(request.outputs)
    largest = (estimation - 1) // (2 * (width + 1)) - 1
    rows = request.block_rows if request.block_rows is not None else min(20, largest)
    if rows < 2 or rows > largest:
        problems.append(
            FieldProblem(
                pointer("block_rows"),
                f"{estimation} samples of {width} signals allow 2 to {max(largest, 2)} block rows"
                + ("" if largest >= 2 else "; the record is too short for a subspace fit"),
            )
        )
    elif request.order is not None and request.order >= rows * len(request.outputs):
        problems.append(
            FieldProblem(
                pointer("order"), f"the order must be below block_rows x outputs ({rows * len(request.outputs)})"
            )
        )
    if problems:
        raise InvalidRequest(problems)
    # The QR factorization of the stacked Hankel matrices dominates: about samples x (2 s w)^2 operations.
    return rows, max(1, (2 * rows * width) ** 2 // WORK_PER_PARAMETER)


def compute_identify(inputs: IdentifyInputs) -> IdentifyOutcome:
    """Fit every output's pairs by nonlinear least squares (or the subspace model)."""
    n = inputs.columns.shape[0]
    if inputs.structure == "subspace":
        deviations = inputs.columns - inputs.operating_point
        e = inputs.estimation
        with np.errstate(all="ignore"):
            model = moesp(deviations[:e], inputs.outputs_data[:e], block_rows=inputs.block_rows, order=inputs.order)
        if not all(np.all(np.isfinite(x)) for x in (model.a, model.b, model.c, model.fitted)):
            raise NumericalError(
                "The subspace fit failed: its matrices are not finite. Check the data", field=("data",)
            )
        return IdentifyOutcome(fits=(), subspace=model)
    deviations = inputs.columns - inputs.operating_point
    used = np.zeros(n, dtype=bool)
    used[: inputs.estimation] = True
    fits = []
    revised = inputs
    for i in range(len(inputs.pairs)):
        y = inputs.outputs_data[:, i]
        note = inputs.notes[len(inputs.inputs) + len(inputs.disturbances) + i]
        measured = inputs.outputs_measured[:, i]
        runs = frozen_runs(measured, min_length=FROZEN_SAMPLES) if inputs.outlier_limit is not None else []
        if runs:  # candidates only, left out of the first fit: the second keeps those its model explains
            y = y.copy()
            for start, stop in runs:
                y[start:stop] = np.nan
            parameters = sum(len(STRUCTURES[spec.structure]) for spec in inputs.pairs[i]) + 1 + inputs.detrend
            if int(np.isfinite(y[: inputs.estimation]).sum()) <= max(MIN_SAMPLES, 2 * parameters):
                y = inputs.outputs_data[:, i]  # too few samples without them: judge them on the fit with them
        fit = _fit_one(inputs, i, y, deviations, used)
        if note.outliers.size or runs:
            assert inputs.outlier_limit is not None
            # a running median calls the plant's own sharp turns outliers too, and a quiet plant
            # measured without noise reads one value for long: keep out only the samples the fitted
            # model does not explain either (a frozen stretch whole), and fit again without the others
            present = used & np.isfinite(y)
            kept = outliers_of_fit(measured, fit.fitted, present, note.outliers, limit=inputs.outlier_limit)
            stuck = [
                np.arange(a, b)
                for a, b in runs
                if outliers_of_fit(measured, fit.fitted, present, np.arange(a, b), limit=inputs.outlier_limit).size
            ]
            frozen = np.concatenate(stuck) if stuck else np.zeros(0, dtype=np.int64)
            left_out = np.union1d(kept, frozen).astype(np.int64)
            if left_out.size < int(np.sum(~np.isfinite(y) & np.isfinite(measured))):
                y = measured.copy()
                y[left_out] = np.nan
                fit = _fit_one(inputs, i, y, deviations, used)
            revised = _with_outliers(revised, i, y, kept, frozen)
        fits.append(fit)
    return IdentifyOutcome(fits=tuple(fits), checked=revised if revised is not inputs else None)


def _with_outliers(
    inputs: IdentifyInputs,
    i: int,
    y: NDArray[np.float64],
    outliers: NDArray[np.int64],
    frozen: NDArray[np.int64],
) -> IdentifyInputs:
    """``inputs`` with output ``i``'s samples ``y`` and its outliers and frozen stretches as the
    fitted model judged them."""
    at = len(inputs.inputs) + len(inputs.disturbances) + i
    old = inputs.notes[at]
    _, old_warning = _output_note(old.tag, old.missing, old.outliers, inputs.outlier_limit)
    note, warning = _output_note(old.tag, old.missing, outliers, inputs.outlier_limit, frozen=frozen, judged=True)
    warnings = list(inputs.warnings)
    if old_warning is not None:
        at_warning = warnings.index(old_warning)
        warnings[at_warning : at_warning + 1] = [warning] if warning is not None else []
    elif warning is not None:  # frozen stretches only: after the other warnings of the data
        warnings.insert(_after_data_warnings(warnings), warning)
    data = inputs.outputs_data.copy()
    data[:, i] = y
    notes = list(inputs.notes)
    notes[at] = note
    return replace(inputs, outputs_data=data, notes=tuple(notes), warnings=tuple(warnings))


def _after_data_warnings(warnings: list[WarningReport]) -> int:
    """Where the warnings about the data (missing samples, samples left out) end."""
    data = [k for k, w in enumerate(warnings) if w.code in ("missing_samples", "samples_left_out")]
    return data[-1] + 1 if data else 0


def _fit_one(
    inputs: IdentifyInputs,
    i: int,
    y: NDArray[np.float64],
    deviations: NDArray[np.float64],
    used: NDArray[np.bool_],
) -> OutputFit:
    """The fit of output ``i`` to the samples ``y`` (``nan``: left out); a failure in the trade's words."""
    pairs = inputs.pairs[i]
    fit: OutputFit | None = None
    try:
        with np.errstate(all="ignore"):
            fit = fit_output(
                y,
                deviations,
                pairs,
                sample_time=inputs.sample_time,
                used=used & np.isfinite(y),
                max_dead_time=inputs.max_dead_time,
                settling_samples=inputs.settling_samples,
                integrating=inputs.integrating[i],
                detrend=inputs.detrend,
            )
    except (ValueError, np.linalg.LinAlgError, FloatingPointError, AssertionError):
        # the reason in the trade's words: the library's ("array must not contain infs or
        # NaNs") or an assertion's text would name the code, not the data
        fit, finite = None, False
        reason = "its numbers left double precision on the way"
    else:
        finite = bool(all(np.all(np.isfinite(t)) for t in fit.parameters) and np.all(np.isfinite(fit.fitted)))
        reason = "the fitted parameters are not finite"
    if fit is None or not finite:
        raise NumericalError(
            f"The fit of {inputs.outputs[i]} failed ({reason}): the data or the sample time overflow double "
            f"precision, or the pairs cannot be told apart. Check the units and the magnitudes of the columns "
            f"and of sample_time",
            field=("data", inputs.outputs[i]),
        )
    return fit


def _number(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _parameter(name: str, estimate: float, error: float, at_bound: bool = False) -> ParameterReport:
    return ParameterReport(name=name, estimate=float(estimate), standard_error=_number(error), at_bound=bool(at_bound))


def _segment(y: NDArray[np.float64], fitted: NDArray[np.float64], used: NDArray[np.bool_]) -> SegmentFitReport:
    fit, r2 = fit_measures(y, fitted, used)
    return SegmentFitReport(samples=int(used.sum()), nrmse_fit_percent=_number(fit), r_squared=_number(r2))


def _step_steps(structure: str, theta: NDArray[np.float64], sample_time: float, cap: int) -> int:
    names = STRUCTURES[structure]
    values = dict(zip(names, theta, strict=True))
    lags = sum(v for k, v in values.items() if k.startswith("time_constant"))
    return int(min(cap, max(10, np.ceil((values["dead_time"] + 5.0 * lags) / sample_time) + 2)))


def identify_response(inputs: IdentifyInputs, outcome: IdentifyOutcome) -> IdentifyResponse:
    """The answer: the model for /design (with its operating point), parameters, fits and checks."""
    if outcome.subspace is not None:
        from service.pipeline.identify_subspace import subspace_response

        return subspace_response(inputs, outcome.subspace, data_report(inputs))
    inputs = outcome.checked or inputs
    ts = inputs.sample_time
    column_tags = [*inputs.inputs, *inputs.disturbances]
    m = len(inputs.inputs)
    n = inputs.columns.shape[0]
    deviations = inputs.columns - inputs.operating_point
    warnings = list(inputs.warnings) + list(outcome.warnings)
    elements: list[list[TransferElementModel | None]] = []
    disturbance_elements: list[list[TransferElementModel | None]] = []
    pair_reports: list[PairFitReport] = []
    fit_reports: list[OutputFitReport] = []
    steps: list[StepSeriesReport] = []
    offsets: list[float] = []
    estimation = np.zeros(n, dtype=bool)
    estimation[: inputs.estimation] = True
    for i, (tag, pairs, fit) in enumerate(zip(inputs.outputs, inputs.pairs, outcome.fits, strict=True)):
        row: list[TransferElementModel | None] = [None] * len(column_tags)
        for spec, theta, error, bound in zip(pairs, fit.parameters, fit.standard_errors, fit.at_bound, strict=True):
            column = column_tags[spec.column]
            element = element_of(spec.structure, theta)
            row[spec.column] = TransferElementModel(
                gain=element.gain,
                time_constants=list(element.time_constants),
                dead_time=element.dead_time,
                integrating=element.integrating,
            )
            names = STRUCTURES[spec.structure]
            pair_reports.append(
                PairFitReport(
                    output=tag,
                    input=column,
                    structure=spec.structure,
                    parameters=[_parameter(*z) for z in zip(names, theta, error, bound, strict=True)],
                )
            )
            gain, gain_error = float(theta[0]), float(error[0])
            # a gain within its 99 % interval of zero: the data show no effect, whatever the cause
            unseen = not (np.isfinite(gain_error) and abs(gain) > Z99 * gain_error)
            if unseen or gain_error > WEAK_GAIN * abs(gain):
                warnings.append(_weak_gain_warning(inputs, tag, column, pairs, gain, gain_error, unseen=unseen))
            for name, flag in zip(names, bound, strict=True):
                # at its upper limit; a dead time at its lower limit, zero, is no finding, nor is
                # the dead time of an effect the data do not show (it is warned of above)
                if (
                    flag
                    and not unseen
                    and name == "dead_time"
                    and theta[names.index("dead_time")] > 0.5 * inputs.max_dead_time
                ):
                    warnings.append(
                        WarningReport(
                            code="parameter_at_bound",
                            message=f"the dead time of {tag} from {column} ended at its limit "
                            f"({inputs.max_dead_time:g}); raise max_dead_time or check the data",
                        )
                    )
            count = _step_steps(spec.structure, theta, ts, STEP_RESPONSE_SAMPLES)
            steps.append(
                StepSeriesReport(
                    output=tag,
                    input=column,
                    time=(ts * np.arange(count + 1)).tolist(),
                    value=step_values(spec.structure, theta, count, sample_time=ts).tolist(),
                )
            )
        elements.append(row[:m])
        disturbance_elements.append(row[m:])
        y = inputs.outputs_data[:, i]
        present = np.isfinite(y)
        residuals = np.where(present, y - fit.fitted, 0.0)
        used = estimation & present
        auto, cross = residual_correlations(residuals, used, deviations, lags=inputs.lags)
        warnings += correlated_residuals(tag, auto, remedy="try second_order_dead_time")
        validation = None
        if inputs.estimation < n:
            validation = _segment(y, fit.fitted, ~estimation & present)
        offsets.append(fit.offset)
        fit_reports.append(
            OutputFitReport(
                output=tag,
                estimation=_segment(y, fit.fitted, used),
                validation=validation,
                residual_std=fit.residual_std,
                offset=_parameter("offset", fit.offset, fit.offset_error),
                drift=None
                if fit.drift is None
                else _parameter("drift", fit.drift, fit.drift_error if fit.drift_error is not None else np.nan),
                autocorrelation=CorrelationReport(
                    lags=auto.lags.tolist(), values=auto.values.tolist(), bound=auto.bound, outside=auto.outside
                ),
                cross_correlation=[
                    CrossCorrelationReport(
                        input=column,
                        lags=c.lags.tolist(),
                        values=c.values.tolist(),
                        bound=c.bound,
                        outside=c.outside,
                    )
                    for column, c in zip(column_tags, cross, strict=True)
                ],
            )
        )
    model = TransferMatrixModel(
        kind="transfer_matrix",
        sample_time=ts,
        elements=elements,
        disturbance_elements=disturbance_elements if inputs.disturbances else None,
        inputs=[SignalTag(name=t) for t in inputs.inputs],
        outputs=[SignalTag(name=t) for t in inputs.outputs],
        disturbances=[SignalTag(name=t) for t in inputs.disturbances] if inputs.disturbances else None,
        operating_point=fitted_operating_point(inputs, offsets),
    )
    data = data_report(inputs)
    return IdentifyResponse(
        model=model,
        pairs=pair_reports,
        fits=fit_reports,
        step_responses=steps,
        data=data,
        warnings=warnings,
    )


def _weak_gain_warning(
    inputs: IdentifyInputs,
    tag: str,
    column: str,
    pairs: tuple[PairSpec, ...],
    gain: float,
    gain_error: float,
    *,
    unseen: bool,
) -> WarningReport:
    """The warning of a gain the data determine poorly (``unseen``: not told from zero at 99 %)."""
    column_tags = [*inputs.inputs, *inputs.disturbances]
    error_text = f"{gain_error:.2g}" if np.isfinite(gain_error) else "undetermined (infinite)"
    # inputs that moved together are told apart by no amount of moving them so: say so
    others = [t for t in inputs.moved_with.get(column, ()) if any(q.column == column_tags.index(t) for q in pairs)]
    if others:
        return WarningReport(
            code="weak_excitation",
            message=f"input {column} moved together with {', '.join(others)}, so its effect on {tag} cannot be "
            f"told apart from theirs: gain {gain:.4g} with a standard error of {error_text}. Repeat the test "
            f"moving {column} independently of {', '.join(others)}, or leave one of the pairs out (structure "
            f"'none')",
        )
    if unseen:
        # as likely no effect as too small a move: the data cannot say which, so the warning names both
        moves = inputs.columns[: inputs.estimation, column_tags.index(column)]
        interval = f"{Z99 * gain_error:.2g}" if np.isfinite(gain_error) else "an undetermined amount"
        return WarningReport(
            code="no_significant_effect",
            message=f"the effect of {column} on {tag} cannot be told from zero: gain {gain:.4g} +- {interval} "
            f"(99 %), with {column} moved over a range of {float(np.ptp(moves)):.4g}. Either {column} does not "
            f"act on {tag} (leave the pair out, structure 'none'), or its moves were too small or too few to "
            f"show it (repeat the test with larger moves of {column})",
        )
    return WarningReport(
        code="weak_excitation",
        message=f"input {column} moved too little to identify its effect on {tag}: gain {gain:.4g} with a "
        f"standard error of {error_text}. Repeat the test with larger or more moves of {column}, or leave the "
        f"pair out (structure 'none')",
    )


def correlated_residuals(tag: str, auto: Correlation, *, remedy: str) -> list[WarningReport]:
    """``residuals_correlated`` for output ``tag`` when more than a tenth of the lags (at least one) of
    its residuals' autocorrelation fall outside the 99 % bound; ``remedy`` names the first thing to try."""
    lags = int(auto.lags.size)
    if auto.outside <= max(1, lags // 10):
        return []
    return [
        WarningReport(
            code="residuals_correlated",
            message=f"the residuals of {tag} are correlated ({auto.outside} of {lags} lags outside the 99 % "
            f"bound): the model leaves dynamics unexplained ({remedy}, detrend, or look for unmeasured "
            f"disturbances)",
        )
    ]


def fitted_operating_point(inputs: IdentifyInputs, offsets: list[float]) -> OperatingPoint:
    """The fitted model's ``operating_point``: the model holds for deviations from it.

    The inputs' and measured disturbances' values at the first sample (the deviations the fit
    used, ``inputs.operating_point``) and each output's fitted offset (``offsets``, one per
    output, in the order of ``inputs.outputs``).
    """
    m = len(inputs.inputs)
    start = [float(v) for v in inputs.operating_point]
    return OperatingPoint(
        inputs=start[:m],
        outputs=[float(v) for v in offsets],
        disturbances=start[m:] if inputs.disturbances else None,
    )


def data_report(inputs: IdentifyInputs) -> DataReport:
    """What was found in the data and done with it."""
    n = inputs.columns.shape[0]
    return DataReport(
        samples=n,
        sample_time=inputs.sample_time,
        resampling=inputs.resampling,
        estimation_samples=inputs.estimation,
        validation_samples=n - inputs.estimation,
        tags=[
            TagDataReport(
                tag=note.tag,
                missing=int(note.missing.size),
                outliers=int(note.outliers.size),
                frozen=int(note.frozen.size),
                first_frozen=note.frozen[:20].tolist(),
                first_missing=note.missing[:20].tolist(),
                first_outliers=note.outliers[:20].tolist(),
                handling=note.handling,
            )
            for note in inputs.notes
        ],
    )


def run_identify(request: IdentifyRequest, caps: Caps) -> IdentifyResponse:
    """Check, fit, answer."""
    inputs = check_identify(request, caps)
    return identify_response(inputs, compute_identify(inputs))
