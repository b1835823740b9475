"""Margins where the fixed grid used to miss them (issue 13, items 1 and 2).

References: a dense frequency sweep (200 001 points, zero frequency included) of the loop
built from the controller realization; the closed loop's spectral radius with the loop gain
scaled just below and just above the gain margin (the margin is where the loop turns
unstable, by its definition); python-control's ``stability_margins`` on the same loop as an
independent implementation of the phase margin.
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.realization import StateSpace, closed_loop_poles, controller_system, plant_system
from service.solver.evaluation.frequency import design_frequency_analysis
from service.solver.models.sampling import sample_zero_order_hold


def _lightly_damped():
    """The issue's loop: a lightly damped oscillator sampled at 0.2, Kalman filter, no disturbance model."""
    s = sample_zero_order_hold(np.array([[0.0, 1.0], [-1.0, -0.1]]), np.array([[0.0], [1.0]]), sample_time=0.2)
    c = np.array([[1.0, 0.0]])
    design = design_controller(s.a, s.b, c, output_weight=[1.0], move_weight=[0.1], prediction=30, control=3)
    estimator = design_estimator(s.a, s.b, c, kind="kalman", disturbance="none")
    return design, estimator, 0.2


def _slow():
    """The issue's slow loop: a = 0.9, b = 0.1, c = 1, move weight 1e6, the default estimator."""
    design = design_controller(
        [[0.9]], [[0.1]], [[1.0]], output_weight=[1.0], move_weight=[1e6], prediction=30, control=3
    )
    estimator = design_estimator([[0.9]], [[0.1]], [[1.0]])
    return design, estimator, 1.0


def _systems(design, estimator):
    n = estimator.state_size
    plant = plant_system(estimator.model_a, estimator.model_b, estimator.c_measured[:, :n])
    return plant, controller_system(design, estimator)


def _loop(plant, controller, w, ts):
    z = np.exp(1j * w * ts)
    return -(controller.evaluate(z) @ plant.evaluate(z))[:, 0, 0]


def _scaled(controller: StateSpace, k: float) -> StateSpace:
    return StateSpace(controller.a, controller.b, k * controller.c, k * controller.d)


def test_gain_margin_at_zero_frequency():
    design, estimator, ts = _lightly_damped()
    margins = design_frequency_analysis(design, estimator, sample_time=ts).plant_input.margins
    plant, controller = _systems(design, estimator)
    # dense sweep: L(1) is real and negative, and no phase crossover comes closer to -1
    w = np.concatenate([[0.0], np.logspace(-8, np.log10(np.pi / ts), 200_000)])
    values = _loop(plant, controller, w, ts)
    assert values[0].imag == pytest.approx(0.0, abs=1e-12) and values[0].real < 0
    crossing = np.nonzero(np.sign(values.imag[:-1]) * np.sign(values.imag[1:]) < 0)[0]
    candidates = [values[0].real] + [values[i].real for i in crossing if values[i].real < 0]
    dense = min((1.0 / abs(v) for v in candidates), key=lambda g: abs(np.log(g)))
    assert margins.gain_margin == pytest.approx(dense, rel=1e-4)
    assert margins.gain_margin == pytest.approx(1 / abs(values[0].real), rel=1e-9)
    assert margins.phase_crossover_frequency == 0.0
    # the definition: stable just below the margin, unstable just above
    below = np.abs(closed_loop_poles(plant, _scaled(controller, 0.99 * margins.gain_margin))).max()
    above = np.abs(closed_loop_poles(plant, _scaled(controller, 1.01 * margins.gain_margin))).max()
    assert below < 1.0 < above


def test_slow_loop_crossover_is_found():
    design, estimator, ts = _slow()
    analysis = design_frequency_analysis(design, estimator, sample_time=ts)
    margins = analysis.plant_input.margins
    plant, controller = _systems(design, estimator)
    assert margins.gain_crossover_frequency is not None
    assert analysis.frequencies[0] < margins.gain_crossover_frequency  # the grid reaches below it
    # dense sweep: |L| = 1 there
    assert abs(_loop(plant, controller, np.array([margins.gain_crossover_frequency]), ts)[0]) == pytest.approx(
        1.0, rel=1e-6
    )
    # python-control's margins of the same loop (an independent implementation)
    p = control.ss(plant.a, plant.b, plant.c, plant.d, ts)
    k = control.ss(controller.a, controller.b, controller.c, controller.d, ts)
    loop = control.frd(-(k * p), np.logspace(-7, np.log10(np.pi / ts) - 1e-9, 20_000))
    gm, pm, sm, wpc, wgc, wms = control.stability_margins(loop)
    assert wgc == pytest.approx(margins.gain_crossover_frequency, rel=1e-3)
    assert pm == pytest.approx(margins.phase_margin, abs=1e-2)
    assert analysis.plant_input.bandwidth is not None
