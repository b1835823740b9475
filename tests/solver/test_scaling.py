"""Scaling signals by their spans: a change of units that leaves the controller unchanged.

Reference (a change of units, common practice): the cost ``sum |z - r|^2_Q + |du|^2_R`` of
scaled signals ``z_s = S_z^-1 z``, ``u_s = S_u^-1 u`` equals the cost in engineering units
with ``Q_e = S_z^-1 Q S_z^-1`` and ``R_e = S_u^-1 R S_u^-1``; so the design on the scaled
plant, brought back by ``unscale_gain``, must equal the design done directly in engineering
units with those weights, and the closed-loop poles must not move.  Badly scaled units on
purpose: spans from 1e-3 to 1e3.
"""

from __future__ import annotations

import numpy as np

from service.solver.design.controller import design_controller
from service.solver.models.scaling import scale_plant, unscale_feedforward, unscale_gain
from tests.conftest import random_plant


def test_scaled_plant_is_the_change_of_units(rng):
    a, b, c = random_plant(rng, 4, 3, 2)
    bd = rng.normal(size=(4, 2))
    su, sz, sd = np.array([0.001, 5.0, 200.0]), np.array([1000.0, 0.02]), np.array([3.0, 0.5])
    scaled = scale_plant(a, b, c, input_span=su, output_span=sz, b_disturbance=bd, disturbance_span=sd)
    x, u, d = rng.normal(size=4), rng.normal(size=3), rng.normal(size=2)
    # The same state step in both unit systems, the outputs divided by their spans.
    np.testing.assert_allclose(
        scaled.a @ x + scaled.b @ (u / su) + scaled.b_disturbance @ (d / sd), a @ x + b @ u + bd @ d, rtol=1e-12
    )
    np.testing.assert_allclose(scaled.c @ x, (c @ x) / sz, rtol=1e-12)
    assert scale_plant(a, b, c, input_span=su, output_span=sz).b_disturbance is None


def test_unscaled_gain_equals_the_design_in_engineering_units(rng):
    a, b, c = random_plant(rng, 5, 3, 2)
    su, sz = np.array([0.001, 5.0, 200.0]), np.array([1000.0, 0.02])
    q, r = np.array([1.0, 4.0]), np.array([0.5, 0.1, 2.0])
    scaled = scale_plant(a, b, c, input_span=su, output_span=sz)
    options = {"prediction": 12, "control": 4}
    design_s = design_controller(scaled.a, scaled.b, scaled.c, output_weight=q, move_weight=r, **options)
    design_e = design_controller(a, b, c, output_weight=q / sz**2, move_weight=r / su**2, **options)
    back = unscale_gain(design_s.gain, input_span=su, output_span=sz)
    for name in ("horizon", "state", "previous_input", "setpoint"):
        expected = getattr(design_e.gain, name)
        np.testing.assert_allclose(getattr(back, name), expected, rtol=1e-7, atol=1e-9 * np.abs(expected).max())
    # The closed-loop poles do not depend on the units.
    np.testing.assert_allclose(
        np.sort_complex(design_s.loop.poles), np.sort_complex(design_e.loop.poles), rtol=0, atol=1e-6
    )


def test_unscaled_feedforward_is_the_change_of_units(rng):
    kd_s = rng.normal(size=(3, 2))
    su, sd = np.array([0.001, 5.0, 200.0]), np.array([3.0, 0.5])
    kd = unscale_feedforward(kd_s, input_span=su, disturbance_span=sd)
    d = rng.normal(size=2)
    # du = Kd d in engineering units is S_u (Kd_s (S_d^-1 d)).
    np.testing.assert_allclose(kd @ d, su * (kd_s @ (d / sd)), rtol=1e-12)
