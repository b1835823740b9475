"""The step-response model kind: checks, the exact realization and the optional reduction.

Every check names its field by JSON pointer; the solver sees only tables that passed.
"""

from __future__ import annotations

import numpy as np

from service.errors import FieldProblem
from service.pipeline.caps import Caps
from service.pipeline.problems import pointer
from service.schemas.step_response import ReductionReport, StepGrid, StepResponseModel
from service.solver.models.reduction import balanced_truncation
from service.solver.models.step_response import StepResponse, step_response_model, step_state_count

__all__ = ["step_response_parts"]

Where = tuple[str | int, ...]


def _grid(
    rows: StepGrid, where: Where, *, expected_rows: int | None, allow_empty_rows: bool, names: list[str]
) -> tuple[list[list[StepResponse | None]] | None, list[FieldProblem]]:
    if not rows:
        return None, [FieldProblem(pointer(*where), "give at least one row of step responses")]
    if expected_rows is not None and len(rows) != expected_rows:
        return None, [
            FieldProblem(pointer(*where), f"{len(rows)} rows given; there are {expected_rows} controlled outputs")
        ]
    problems: list[FieldProblem] = []
    width = len(rows[0])
    if width == 0:
        problems.append(FieldProblem(pointer(*where, 0), "rows must not be empty"))
    converted: list[list[StepResponse | None]] = []
    for i, row in enumerate(rows):
        if len(row) != width:
            problems.append(FieldProblem(pointer(*where, i), f"row {i} has {len(row)} pairs, row 0 has {width}"))
        if not allow_empty_rows and row and all(pair is None for pair in row):
            name = f" ({names[i]})" if i < len(names) else ""
            problems.append(
                FieldProblem(
                    pointer(*where, i),
                    f"row {i}{name} has no step response: no input affects this output, so it cannot be controlled",
                )
            )
        converted.append(
            [None if pair is None else StepResponse(np.array(pair.coefficients), pair.integrating) for pair in row]
        )
    return (None if problems else converted), problems


def _longest(rows: StepGrid) -> tuple[int, int]:
    best, at = -1, (0, 0)
    for i, row in enumerate(rows):
        for j, pair in enumerate(row):
            if pair is not None and len(pair.coefficients) > best:
                best, at = len(pair.coefficients), (i, j)
    return at


def step_response_parts(
    model: StepResponseModel, caps: Caps, where: Where
) -> tuple[dict[str, object] | None, ReductionReport | None, list[FieldProblem]]:
    """Check a step-response table against the caps, realize it, reduce it when asked.

    Returns
    -------
    parts : dict or None
        The discrete plant's matrices, as :func:`service.pipeline.plant.plant_arrays` takes them.
    reduction : ReductionReport or None
        What the balanced truncation kept, when ``model.reduction`` is given.
    problems : list of FieldProblem
    """
    names = [tag.name for tag in model.outputs or []]
    elements, problems = _grid(
        model.responses, (*where, "responses"), expected_rows=None, allow_empty_rows=False, names=names
    )
    if elements is None:
        return None, None, problems
    p, m = len(elements), len(elements[0])
    for count, at, what in ((p, (*where, "responses"), "outputs"), (m, (*where, "responses", 0), "inputs")):
        if count > caps.max_signals:
            problems.append(
                FieldProblem(pointer(*at), f"{count} {what}; this service accepts at most {caps.max_signals}")
            )
    disturbance = None
    if model.disturbance_responses is not None:
        disturbance, found = _grid(
            model.disturbance_responses,
            (*where, "disturbance_responses"),
            expected_rows=p,
            allow_empty_rows=True,
            names=names,
        )
        problems += found
    if problems:
        return None, None, problems
    count = step_state_count(elements, disturbance_elements=disturbance)
    if count > caps.max_states:
        i, j = _longest(model.responses)
        return (
            None,
            None,
            [
                FieldProblem(
                    pointer(*where, "responses", i, j, "coefficients"),
                    f"the exact realization needs {count} states (one per coefficient of the longest pair of each "
                    f"input); this service accepts at most {caps.max_states}. Shorten the tables once they have "
                    f"settled, or use a longer sample time",
                )
            ],
        )
    sampled = step_response_model(elements, disturbance_elements=disturbance)
    a, b, c, bd = sampled.a, sampled.b, sampled.c, sampled.b_disturbance
    roles: object = sampled.states
    report = None
    if model.reduction is not None:
        integrators = sum(role.kind == "output_integrator" for role in sampled.states)
        wanted = model.reduction.states
        if wanted is not None and wanted < integrators:
            return (
                None,
                None,
                [
                    FieldProblem(
                        pointer(*where, "reduction", "states"),
                        f"{wanted} states asked, but the model has {integrators} integrators (kept whole)",
                    )
                ],
            )
        md = 0 if bd is None else bd.shape[1]
        both = b if bd is None else np.hstack((b, bd))
        try:
            with np.errstate(over="raise", invalid="raise"):
                reduced = balanced_truncation(a, both, c, states=wanted, tolerance=model.reduction.tolerance)
            finite = all(np.all(np.isfinite(x)) for x in (reduced.a, reduced.b, reduced.c))
        except (FloatingPointError, ValueError, np.linalg.LinAlgError):
            finite = False
        if not finite:
            return (
                None,
                None,
                [
                    FieldProblem(
                        pointer(*where, "responses"),
                        "the reduction of these step responses overflows double precision: some coefficients are "
                        "too large (or too small) for their units (the Gramians hold their squares). Express the "
                        "signals in units where the numbers are moderate",
                    )
                ],
            )
        a, c = reduced.a, reduced.c
        b, bd = reduced.b[:, :m], (None if bd is None else reduced.b[:, m : m + md])
        roles = None
        report = ReductionReport(
            states_before=sampled.state_count,
            states_after=a.shape[0],
            integrators_kept=reduced.unstable,
            hankel_singular_values=reduced.hankel_singular_values.tolist(),
            error_bound=reduced.error_bound,
        )
    return (
        {
            "a": a,
            "b": b,
            "c": c,
            "b_disturbance": bd,
            "c_measured": c,
            "d_measured": np.zeros((p, m)),
            "state_roles": roles,
            "sampled": False,
        },
        report,
        [],
    )
