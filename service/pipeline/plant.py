"""From a validated plant model to a discrete plant as arrays, with its tags and spans.

Every check here names its field by JSON pointer; the solver only sees what passed.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.arrays import check_matrix
from service.pipeline.caps import Caps
from service.pipeline.problems import pointer
from service.pipeline.step_response import step_response_parts
from service.schemas.model import PlantModel, StateSpaceModel, TransferElementModel, TransferMatrixModel
from service.schemas.signals import SignalTag
from service.schemas.step_response import ReductionReport, StepResponseModel
from service.solver.models.sampling import sample_zero_order_hold
from service.solver.models.transfer import (
    STIFFNESS_LIMIT,
    StateRole,
    TransferElement,
    stiffness_ratio,
    transfer_matrix_model,
    transfer_state_count,
)

__all__ = ["DiscretePlant", "Signal", "plant_arrays", "require_plant"]

Where = tuple[str | int, ...]


@dataclass(frozen=True)
class Signal:
    """A signal's resolved tag: name (default ``u1``, ``z1``, ``d1``, ``y1``), unit, span.

    ``span`` is 1 when the request gave none; ``spanned`` says whether it gave one (a signal
    without a span has its natural size where a size is needed, not 1 in its unit).
    """

    name: str
    unit: str | None
    span: float
    spanned: bool = False


@dataclass(frozen=True)
class DiscretePlant:
    """A validated discrete-time plant as arrays, in engineering units.

    Attributes
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        Controlled outputs (strictly proper).
    sample_time : float
    b_disturbance : ndarray, shape (n, md), or None
    c_measured : ndarray, shape (py, n)
    d_measured : ndarray, shape (py, m)
    inputs, outputs, disturbances, measured : tuple of Signal
    state_labels : tuple of str
    sampled : bool
        The matrices were sampled from a continuous model here.
    reduction : ReductionReport or None
        What the balanced truncation of a step-response model kept, when asked.
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    sample_time: float
    b_disturbance: NDArray[np.float64] | None
    c_measured: NDArray[np.float64]
    d_measured: NDArray[np.float64]
    inputs: tuple[Signal, ...]
    outputs: tuple[Signal, ...]
    disturbances: tuple[Signal, ...]
    measured: tuple[Signal, ...]
    state_labels: tuple[str, ...]
    sampled: bool
    reduction: ReductionReport | None = None

    @property
    def states(self) -> int:
        return int(self.a.shape[0])

    @property
    def input_count(self) -> int:
        return int(self.b.shape[1])

    @property
    def output_count(self) -> int:
        return int(self.c.shape[0])

    @property
    def scaled(self) -> bool:
        """Some signal has a span other than 1."""
        return any(s.span != 1.0 for s in (*self.inputs, *self.outputs, *self.disturbances))

    @staticmethod
    def spans(signals: Sequence[Signal]) -> NDArray[np.float64]:
        """Spans of ``signals`` as an array."""
        return np.array([s.span for s in signals], dtype=float)

    @cached_property
    def input_spans(self) -> NDArray[np.float64]:
        """Spans of the manipulated variables, shape (m,); computed once, read-only."""
        return _read_only(self.spans(self.inputs))

    @cached_property
    def output_spans(self) -> NDArray[np.float64]:
        """Spans of the controlled outputs, shape (p,); computed once, read-only."""
        return _read_only(self.spans(self.outputs))

    @cached_property
    def measured_spans(self) -> NDArray[np.float64]:
        """Spans of the measured outputs, shape (py,) (the controlled outputs' by default); read-only."""
        return _read_only(self.spans(self.measured))

    @property
    def measured_own(self) -> bool:
        """The measured outputs are signals of their own: ``c_measured`` other than ``c``, or a feed-through."""
        return not (self.c_measured.shape == self.c.shape and np.array_equal(self.c_measured, self.c)) or bool(
            np.any(self.d_measured)
        )

    @cached_property
    def disturbance_spans(self) -> NDArray[np.float64]:
        """Spans of the measured disturbances, shape (md,) (empty without any); computed once, read-only."""
        return _read_only(self.spans(self.disturbances))


def _read_only(values: NDArray[np.float64]) -> NDArray[np.float64]:
    values.setflags(write=False)
    return values


def _signals(
    tags: Sequence[SignalTag] | None, count: int, prefix: str, where: Where, what: str
) -> tuple[tuple[Signal, ...], list[FieldProblem]]:
    """Resolve a tag list against its signal count; check names are unique and spans consistent."""
    if tags is None:
        return tuple(Signal(f"{prefix}{i + 1}", None, 1.0) for i in range(count)), []
    if len(tags) != count:
        return (), [FieldProblem(pointer(*where), f"{len(tags)} tags given for {count} {what}")]
    problems: list[FieldProblem] = []
    seen: dict[str, int] = {}
    for i, tag in enumerate(tags):
        if tag.name in seen:
            problems.append(
                FieldProblem(
                    pointer(*where, i, "name"),
                    f"tag name {tag.name!r} is used twice in this list (also at {seen[tag.name]})",
                )
            )
        seen.setdefault(tag.name, i)
    with_span = [tag.span is not None for tag in tags]
    if any(with_span) and not all(with_span):
        missing = with_span.index(False)
        problems.append(
            FieldProblem(
                pointer(*where, missing, "span"),
                f"give a span for every one of the {what} or for none (scaling applies to the whole list)",
            )
        )
    signals = tuple(Signal(t.name, t.unit, t.span if t.span is not None else 1.0, t.span is not None) for t in tags)
    return signals, problems


def _cap_signals(count: int, where: Where, what: str, caps: Caps) -> list[FieldProblem]:
    if count > caps.max_signals:
        return [FieldProblem(pointer(*where), f"{count} {what}; this service accepts at most {caps.max_signals}")]
    return []


def _state_space(
    model: StateSpaceModel, caps: Caps, where: Where
) -> tuple[dict[str, object] | None, list[FieldProblem]]:
    a, problems = check_matrix(model.a, (*where, "a"), square=True, what="A")
    if a is None:
        return None, problems
    n = a.shape[0]
    if a.shape[1] != n:
        return None, [FieldProblem(pointer(*where, "a"), f"A must be square; it is {n} x {a.shape[1]}")]
    if n > caps.max_states:
        return None, [
            FieldProblem(pointer(*where, "a"), f"A has {n} states; this service accepts at most {caps.max_states}")
        ]
    b, found = check_matrix(model.b, (*where, "b"), rows=n, what="B")
    problems += found
    c, found = check_matrix(model.c, (*where, "c"), cols=n, what="C")
    problems += found
    if b is not None:
        problems += _cap_signals(b.shape[1], (*where, "b"), "inputs", caps)
    if c is not None:
        problems += _cap_signals(c.shape[0], (*where, "c"), "outputs", caps)
    if b is None or c is None:
        return None, problems
    m, p = b.shape[1], c.shape[0]
    if model.d is not None:
        d, found = check_matrix(model.d, (*where, "d"), rows=p, cols=m, what="D")
        problems += found
        if d is not None and np.any(d):
            i, j = (int(k) for k in np.argwhere(d)[0])
            problems.append(
                FieldProblem(
                    pointer(*where, "d", i),
                    f"the controlled outputs must be strictly proper, but D[{i}][{j}] = {d[i, j]:g}: a move "
                    f"would change that output within the same sample. Give the feed-through on a measured "
                    f"output (d_measured) instead, or model the path with a state",
                )
            )
    bd = None
    if model.b_disturbance is not None:
        bd, found = check_matrix(model.b_disturbance, (*where, "b_disturbance"), rows=n, what="Bd")
        problems += found
        if bd is not None:
            problems += _cap_signals(bd.shape[1], (*where, "b_disturbance"), "disturbances", caps)
    cm: NDArray[np.float64] | None = c
    if model.c_measured is not None:
        cm, found = check_matrix(model.c_measured, (*where, "c_measured"), cols=n, what="measured-output matrix")
        problems += found
        if cm is not None:
            problems += _cap_signals(cm.shape[0], (*where, "c_measured"), "measured outputs", caps)
    dm = None
    if model.d_measured is not None and cm is not None:
        dm, found = check_matrix(
            model.d_measured, (*where, "d_measured"), rows=cm.shape[0], cols=m, what="measured feed-through"
        )
        problems += found
    if problems or cm is None:
        return None, problems
    if model.time_domain == "continuous":
        sampled = sample_zero_order_hold(a, b, sample_time=model.sample_time, b_disturbance=bd, field=(*where, "a"))
        a, b, bd = sampled.a, sampled.b, sampled.b_disturbance
    return {
        "a": a,
        "b": b,
        "c": c,
        "b_disturbance": bd,
        "c_measured": cm,
        "d_measured": dm if dm is not None else np.zeros((cm.shape[0], m)),
        "state_roles": None,
        "sampled": model.time_domain == "continuous",
    }, []


#: Longest dead time accepted, in sample times: far beyond any state cap (each sample of dead
#: time is a state), and short enough that counting its samples stays exact in floating point.
MAX_DEAD_TIME_SAMPLES = 10_000


def _grid(
    rows: list[list[TransferElementModel | None]],
    where: Where,
    *,
    expected_rows: int | None,
    allow_empty_rows: bool,
    sample_time: float,
    row_names: Sequence[str] = (),
) -> tuple[list[list[TransferElement | None]] | None, list[FieldProblem]]:
    """Check an element grid's shape and each element; convert to solver elements.

    ``row_names`` are the outputs' tags, when the request gives them, for the messages.
    """
    if not rows:
        return None, [FieldProblem(pointer(*where), "give at least one row of elements")]
    problems: list[FieldProblem] = []
    if expected_rows is not None and len(rows) != expected_rows:
        return None, [
            FieldProblem(pointer(*where), f"{len(rows)} rows given; there are {expected_rows} controlled outputs")
        ]
    lengths = [len(r) for r in rows]
    width = max(set(lengths), key=lambda w: (lengths.count(w), -lengths.index(w)))
    for i, length in enumerate(lengths):
        if length != width:
            problems.append(FieldProblem(pointer(*where, i), f"row {i} has {length} elements, the others {width}"))
    if width == 0:
        problems.append(FieldProblem(pointer(*where, 0), "rows must not be empty"))
    converted: list[list[TransferElement | None]] = []
    for i, row in enumerate(rows):
        if not allow_empty_rows and row and all(el is None for el in row):
            problems.append(
                FieldProblem(
                    pointer(*where, i),
                    f"row {i}{f' ({row_names[i]})' if i < len(row_names) else ''} has no element: no input "
                    f"affects this output, so it cannot be controlled",
                )
            )
        out: list[TransferElement | None] = []
        for j, el in enumerate(row):
            if el is None:
                out.append(None)
                continue
            here = (*where, i, j)
            if el.lead and not el.time_constants and not el.integrating:
                problems.append(
                    FieldProblem(
                        pointer(*here, "lead"), "a lead needs at least one time constant (or an integrating element)"
                    )
                )
                out.append(None)
                continue
            if el.dead_time > MAX_DEAD_TIME_SAMPLES * sample_time:
                problems.append(
                    FieldProblem(
                        pointer(*here, "dead_time"),
                        f"a dead time of {el.dead_time:g} is {el.dead_time / sample_time:.3g} sample times; this "
                        f"service accepts at most {MAX_DEAD_TIME_SAMPLES:,} (and no more than its state cap in "
                        "dead-time samples). Check its unit against the sample time's",
                    )
                )
                out.append(None)
                continue
            element = TransferElement(
                gain=el.gain,
                time_constants=tuple(el.time_constants),
                dead_time=el.dead_time,
                lead=el.lead,
                integrating=el.integrating,
            )
            if stiffness_ratio(element, sample_time) > STIFFNESS_LIMIT:
                problems.append(
                    FieldProblem(
                        pointer(*here, "time_constants"),
                        f"a time constant of {min(el.time_constants):g} is more than {STIFFNESS_LIMIT:.0e} times "
                        f"shorter than the sample time (or the lead); it has settled within a sample, so leave it out",
                    )
                )
            out.append(element)
        converted.append(out)
    return (None if problems else converted), problems


def _longest_dead_time(rows: list[list[TransferElementModel | None]]) -> tuple[int, int]:
    best, at = -1.0, (0, 0)
    for i, row in enumerate(rows):
        for j, el in enumerate(row):
            if el is not None and el.dead_time > best:
                best, at = el.dead_time, (i, j)
    return at


def _transfer_matrix(
    model: TransferMatrixModel, caps: Caps, where: Where
) -> tuple[dict[str, object] | None, list[FieldProblem]]:
    ts = float(model.sample_time)
    names = [tag.name for tag in model.outputs or []]
    elements, problems = _grid(
        model.elements,
        (*where, "elements"),
        expected_rows=None,
        allow_empty_rows=False,
        sample_time=ts,
        row_names=names,
    )
    if elements is None:
        return None, problems
    p, m = len(elements), len(elements[0])
    problems += _cap_signals(p, (*where, "elements"), "outputs", caps)
    problems += _cap_signals(m, (*where, "elements", 0), "inputs", caps)
    disturbance = None
    if model.disturbance_elements is not None:
        disturbance, found = _grid(
            model.disturbance_elements,
            (*where, "disturbance_elements"),
            expected_rows=p,
            allow_empty_rows=True,
            sample_time=ts,
        )
        problems += found
        if disturbance is not None:
            problems += _cap_signals(len(disturbance[0]), (*where, "disturbance_elements", 0), "disturbances", caps)
    if problems:
        return None, problems
    count = transfer_state_count(elements, sample_time=ts, disturbance_elements=disturbance)
    if count > caps.max_states:
        grid, rows = ("elements", model.elements)
        i, j = _longest_dead_time(rows)
        if disturbance is not None:
            di, dj = _longest_dead_time(model.disturbance_elements or [])
            el = model.disturbance_elements[di][dj] if model.disturbance_elements else None
            mine = model.elements[i][j]
            if el is not None and (mine is None or el.dead_time > mine.dead_time):
                grid, i, j = "disturbance_elements", di, dj
        return None, [
            FieldProblem(
                pointer(*where, grid, i, j, "dead_time"),
                f"the model would need {count} states (mostly dead-time samples) at sample time {ts:g}; "
                f"this service accepts at most {caps.max_states}. Use a longer sample time or check this dead time",
            )
        ]
    sampled = transfer_matrix_model(
        elements,
        sample_time=ts,
        disturbance_elements=disturbance,
        field=(*where, "elements"),
        disturbance_field=(*where, "disturbance_elements"),
    )
    for matrix, grid in ((sampled.d, "elements"), (sampled.d_disturbance, "disturbance_elements")):
        if matrix is not None and np.any(matrix):
            i, j = (int(k) for k in np.argwhere(matrix)[0])
            problems.append(
                FieldProblem(
                    pointer(*where, grid, i, j),
                    "this element reaches its output within the same sample (no dead time, and a lead with a "
                    "single lag, or no dynamics); the controlled outputs must be strictly proper. Give it a "
                    "dead time of at least one sample, or a lag",
                )
            )
    if problems:
        return None, problems
    return {
        "a": sampled.a,
        "b": sampled.b,
        "c": sampled.c,
        "b_disturbance": sampled.b_disturbance,
        "c_measured": sampled.c,
        "d_measured": np.zeros((p, m)),
        "state_roles": sampled.states,
        "sampled": True,
    }, []


def _state_labels(
    roles: Sequence[StateRole] | None,
    n: int,
    inputs: Sequence[Signal],
    outputs: Sequence[Signal],
    disturbances: Sequence[Signal],
) -> tuple[str, ...]:
    """Names of the states: ``x1..xn`` for a state-space model, their roles for a transfer matrix."""
    if roles is None:
        return tuple(f"x{i + 1}" for i in range(n))
    labels = []
    for role in roles:
        column = None
        if role.column is not None:
            column = (disturbances if role.disturbance else inputs)[role.column].name
        output = outputs[role.output].name if role.output is not None else None
        if role.kind == "element":
            labels.append(f"lag {role.lag + 1} of {output} from {column}")
        elif role.kind == "output_integrator":
            labels.append(f"{output} integrator")
        elif role.kind == "input_delay":
            labels.append(f"{column}(k-{role.lag})")
        else:
            labels.append(f"{output} response (k-{role.lag})")
    return tuple(labels)


def plant_arrays(
    model: PlantModel, caps: Caps, where: Where = ("model",)
) -> tuple[DiscretePlant | None, list[FieldProblem]]:
    """Check a model's sizes, shapes and tags against each other and the caps; sample it.

    Parameters
    ----------
    model : PlantModel
    caps : Caps
    where : tuple
        Pointer parts of the model in the request.

    Returns
    -------
    DiscretePlant or None, list of FieldProblem

    Raises
    ------
    service.errors.NumericalError
        When a continuous model cannot be sampled (its exponential overflows).
    """
    reduction = None
    if isinstance(model, StateSpaceModel):
        parts, problems = _state_space(model, caps, where)
    elif isinstance(model, StepResponseModel):
        parts, reduction, problems = step_response_parts(model, caps, where)
    else:
        parts, problems = _transfer_matrix(model, caps, where)
    if parts is None:
        return None, problems
    b, c, bd, cm = parts["b"], parts["c"], parts["b_disturbance"], parts["c_measured"]
    assert isinstance(b, np.ndarray) and isinstance(c, np.ndarray) and isinstance(cm, np.ndarray)
    md = 0 if not isinstance(bd, np.ndarray) else bd.shape[1]
    inputs, found = _signals(model.inputs, b.shape[1], "u", (*where, "inputs"), "inputs")
    problems += found
    outputs, found = _signals(model.outputs, c.shape[0], "z", (*where, "outputs"), "controlled outputs")
    problems += found
    disturbances, found = _signals(model.disturbances, md, "d", (*where, "disturbances"), "measured disturbances")
    problems += found
    measured_tags = model.measured if isinstance(model, StateSpaceModel) else None
    if measured_tags is None and (not isinstance(model, StateSpaceModel) or model.c_measured is None):
        measured = outputs
    else:
        measured, found = _signals(measured_tags, cm.shape[0], "y", (*where, "measured"), "measured outputs")
        problems += found
    if problems:
        return None, problems
    roles = parts.pop("state_roles")
    parts["state_labels"] = _state_labels(roles, int(c.shape[1]), inputs, outputs, disturbances)  # type: ignore[arg-type]
    return (
        DiscretePlant(
            sample_time=float(model.sample_time),
            inputs=inputs,
            outputs=outputs,
            disturbances=disturbances,
            measured=measured,
            reduction=reduction,
            **parts,  # type: ignore[arg-type]
        ),
        [],
    )


def require_plant(model: PlantModel, caps: Caps, where: Where = ("model",)) -> DiscretePlant:
    """:func:`plant_arrays`, raising :class:`InvalidRequest` on any problem."""
    plant, problems = plant_arrays(model, caps, where)
    if plant is None:
        raise InvalidRequest(problems)
    return plant
