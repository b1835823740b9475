"""One diagnosis per mode, no two pieces of advice pulling one weight in opposite directions.

Sources: the discrete time constant -1/ln|z| of a pole (by hand); "dominant" is the pole of
largest modulus (common practice).
"""

from __future__ import annotations

import numpy as np

from service.solver.design.controller import design_controller
from service.solver.evaluation.advice import slow_pole_advice


def test_a_slow_tuning_pole_keeps_the_move_weights_when_the_hessian_asks_to_raise_them():
    d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0], move_weight=[1e3], prediction=5, control=1)
    free = slow_pole_advice([[0.5]], d)
    kept = slow_pole_advice([[0.5]], d, keep_move_weights=True)
    assert free is not None and "lower the move weights" in free.message
    assert kept is not None and "move weights" not in kept.message and "raise the output weights" in kept.message


def test_an_unstable_loop_gets_no_slow_pole_advice():
    # An open-loop unstable pole at 1.2 that no input reaches stays a closed-loop pole: the loop
    # is unstable, and a slow stable pole next to it gets no advice of its own.
    a = np.diag([0.999, 1.2])
    d = design_controller(
        a, [[1.0], [0.0]], [[1.0, 1.0]], output_weight=[1.0], move_weight=[1e4], prediction=5, control=1
    )
    assert d.loop.unstable
    assert slow_pole_advice(a, d) is None
    assert "unstable_closed_loop" in [w.code for w in d.warnings]


def test_dominant_means_largest_modulus():
    # A marginal mode (an input no output sees, pole at 1) sits above the slow pole of the tuning.
    d = design_controller(
        [[0.5]], [[1.0, 0.0]], [[1.0]], output_weight=[1.0], move_weight=[1e3, 1.0], prediction=5, control=1
    )
    assert abs(np.abs(d.loop.poles).max() - 1.0) < 1e-9
    advice = slow_pole_advice([[0.5]], d)
    assert advice is not None and "dominant" not in advice.message and "slowest" in advice.message
