"""Closed-loop poles on the unit circle named by their cause, and a verdict rounding cannot flip.

Sources named beside each check: the eigenvector facts of the incremental loop (the design
notes' closed-loop matrix; a steady state that no weighted output sees makes the error E and
so the move zero); the steady-state gain ``C (I - A)^-1 B`` and its null space from
``scipy.linalg.null_space``; the PBH (Hautus) tests, computed here with ``numpy.linalg.matrix_rank``.
Plants are invented: a column with two compositions and three inputs, a level.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.solver.design.closed_loop import closed_loop, design_warnings
from service.solver.design.controller import design_controller
from service.solver.design.marginal import MARGINAL_TOLERANCE

# Two compositions, three inputs (reflux, boil-up, feed preheat): one spare direction.
A_COLUMN = np.diag([0.9, 0.8])
B_COLUMN = np.array([[1.0, 0.5, 0.2], [0.0, 1.0, 0.3]])
C_COLUMN = np.eye(2)


def _design(a, b, c, q, r, **options):
    return design_controller(
        np.asarray(a, float),
        np.asarray(b, float),
        np.asarray(c, float),
        output_weight=q,
        move_weight=r,
        prediction=options.pop("prediction", 20),
        control=options.pop("control", 3),
        **options,
    )


def _codes(design):
    return [w.code for w in design.warnings]


def test_a_spare_input_gives_a_free_direction_at_one_not_instability():
    d = _design(A_COLUMN, B_COLUMN, C_COLUMN, [1.0, 1.0], [0.1, 0.1, 0.1])
    (mode,) = d.loop.marginal
    assert mode.cause == "free_input_direction" and abs(mode.pole - 1.0) < MARGINAL_TOLERANCE
    # scipy.linalg.null_space of the steady-state gain C (I - A)^-1 B is the free direction.
    gain = C_COLUMN @ np.linalg.solve(np.eye(2) - A_COLUMN, B_COLUMN)
    reference = scipy.linalg.null_space(gain)[:, 0]
    direction = mode.direction / np.linalg.norm(mode.direction)
    assert abs(abs(direction @ reference) - 1.0) < 1e-9
    # The defining equation: [xi; v] with xi = (I - A)^-1 B v is an eigenvector of M at 1.
    xi = np.linalg.solve(np.eye(2) - A_COLUMN, B_COLUMN @ reference)
    vector = np.concatenate([xi, reference])
    assert np.linalg.norm(d.loop.matrix @ vector - vector) < 1e-12
    assert d.loop.stable is False
    assert "free_input_direction" in _codes(d)
    assert "unstable_closed_loop" not in _codes(d) and "pole_near_unit_circle" not in _codes(d)


def test_a_level_with_no_weight_is_named_as_an_unweighted_output():
    a = np.array([[0.9, 0.0], [0.0, 1.0]])  # a composition and an integrating level
    b = np.array([[1.0, 0.5], [0.0, 0.1]])
    d = _design(a, b, np.eye(2), [1.0, 0.0], [0.1, 0.1])
    causes = sorted(m.cause for m in d.loop.marginal)
    # Two poles at 1 (the level, and the input direction that only moves the level).
    assert causes == ["free_input_direction", "unweighted_output"]
    level = next(m for m in d.loop.marginal if m.cause == "unweighted_output")
    assert level.outputs == (1,)
    # [v; 0] with A v = v, C v seen only by the unweighted output: an eigenvector of M at 1.
    vector = np.array([0.0, 1.0, 0.0, 0.0])
    assert np.linalg.norm(d.loop.matrix @ vector - vector) < 1e-12
    assert "unstable_closed_loop" not in _codes(d) and "unweighted_output" in _codes(d)
    # Weighted, the same level is controlled and the loop is strictly stable.
    weighted = _design(a, b, np.eye(2), [1.0, 1.0], [0.1, 0.1])
    assert weighted.loop.marginal == () and weighted.loop.stable is True


def test_an_input_no_output_sees_is_named():
    d = _design([[0.9]], [[1.0, 0.0]], [[1.0]], [1.0], [0.1, 0.1])
    (mode,) = d.loop.marginal
    assert mode.cause == "input_reaches_no_output" and mode.inputs == (1,)
    assert "input_reaches_no_output" in _codes(d) and "unstable_closed_loop" not in _codes(d)


def test_unobservable_and_uncontrollable_modes_are_named():
    a = np.array([[0.9, 0.0], [0.0, 1.0]])
    # Hautus: rank [A - I; C] < n (unobservable), rank [A - I, B] < n (uncontrollable).
    c_blind = np.array([[1.0, 0.0]])
    assert np.linalg.matrix_rank(np.vstack([a - np.eye(2), c_blind])) < 2
    d = _design(a, [[1.0], [1.0]], c_blind, [1.0], [0.1])
    assert [m.cause for m in d.loop.marginal] == ["unobservable_mode"]
    b_blind = np.array([[1.0], [0.0]])
    assert np.linalg.matrix_rank(np.hstack([a - np.eye(2), b_blind])) < 2
    d = _design(a, b_blind, [[1.0, 1.0]], [1.0], [0.1])
    assert [m.cause for m in d.loop.marginal] == ["uncontrollable_mode"]
    assert d.loop.stable is False and "unstable_closed_loop" not in _codes(d)


@pytest.mark.parametrize("offset", [-1e-12, -4.2e-15, 0.0, 4.2e-15, 1e-12, 5e-7])
def test_rounding_never_flips_the_verdict(offset):
    # A pole a hair on either side of 1 is marginal: neither stable nor unstable.
    loop = closed_loop(np.array([[1.0 + offset]]), np.zeros((1, 1)), np.zeros((1, 1)), np.zeros((1, 1)))
    assert loop.stable is False and loop.unstable is False
    codes = [w.code for w in design_warnings(condition_number=1.0, loop=loop)]
    assert "unstable_closed_loop" not in codes


def test_only_a_pole_outside_the_circle_is_unstable():
    loop = closed_loop(np.array([[1.0 + 1e-4]]), np.zeros((1, 1)), np.zeros((1, 1)), np.zeros((1, 1)))
    assert loop.unstable is True and loop.stable is False
    assert "unstable_closed_loop" in [w.code for w in design_warnings(condition_number=1.0, loop=loop)]


def test_the_verdict_does_not_depend_on_units():
    # Scaling an input by 1000 (a change of units) keeps the cause and the verdict.
    scale = np.diag([1.0, 1e-3, 1.0])
    d = _design(A_COLUMN, B_COLUMN @ scale, C_COLUMN, [1.0, 1.0], [0.1, 0.1e-6, 0.1])
    assert [m.cause for m in d.loop.marginal] == ["free_input_direction"] and d.loop.stable is False
