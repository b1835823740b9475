"""A tuning sweep's entries are the separate designs (the issue's definition of a sweep)."""

from __future__ import annotations

import numpy as np

from service.solver.design import design_controller
from service.solver.estimation import design_estimator
from service.solver.frequency import design_frequency_analysis
from service.solver.sweep import sweep_tuning
from tests.conftest import random_plant

BASE = dict(output_weight=[1.0, 2.0], move_weight=[0.1, 0.2], prediction=10, control=4)


def test_move_weight_sweep_entries_equal_separate_designs(rng):
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    est = design_estimator(a, b, c, kind="output_disturbance")
    entries = sweep_tuning(a, b, c, parameter="move_weight", index=1, values=[0.05, 0.5, 5.0],
                           options=BASE, estimator=est, sample_time=1.0, points=40)
    for entry in entries:
        alone = design_controller(a, b, c, **{**BASE, "move_weight": np.diag([0.1, entry.value])})
        assert np.array_equal(entry.design.gain.state, alone.gain.state)
        assert entry.condition_number == alone.hessian.condition_number
        assert entry.spectral_radius == alone.loop.spectral_radius
        fa = design_frequency_analysis(alone, est, sample_time=1.0, points=40)
        assert entry.peak_sensitivity == max(fa.plant_input.peak_sensitivity, fa.plant_output.peak_sensitivity)


def test_horizon_sweep_and_a_failing_value(rng):
    # Two inputs acting alike on one output with no move weight: the Hessian is singular for
    # every horizon (the design core's refusal), so each entry carries the error.
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.9)
    entries = sweep_tuning(a, b, c, parameter="control", values=[1, 2, 4], options={**BASE, "blocking": [0, 2, 3]})
    assert [e.design.hessian.matrix.shape[0] for e in entries] == [2, 2, 6]
    bad = sweep_tuning([[0.5]], [[1.0, 1.0]], [[1.0]], parameter="prediction", values=[3, 5],
                       options=dict(output_weight=[1.0], move_weight=[0.0, 0.0], prediction=3, control=2))
    assert all(e.design is None and e.error is not None and e.error.pointer == "/weights/move" for e in bad)
