"""Closed-loop poles and the design's warnings."""

from __future__ import annotations

import numpy as np

from service.solver.design.controller import design_controller
from tests.conftest import random_plant


def simulate_law(a, b, gain, x0, u0, steps):
    """Run du(k) = -Kx x(k) - Ku u(k-1) on the plant; return [x; u(k-1)] at every step."""
    x, u, trail = x0.copy(), u0.copy(), []
    for _ in range(steps):
        trail.append(np.concatenate([x, u]))
        u = u + (-gain.state @ x - gain.previous_input @ u)
        x = a @ x + b @ u
    return np.array(trail)


def test_poles_annihilate_the_simulated_trajectory(rng):
    # Cayley-Hamilton: the characteristic polynomial of the closed-loop matrix, built from
    # the reported poles (numpy.poly), annihilates every trajectory of the loop. The loop is
    # simulated from the control law itself, not from the reported matrix.
    n, m, p = 3, 2, 2
    a, b, c = random_plant(rng, n, m, p, radius=1.1)
    d = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.5, 0.5], prediction=20, control=4)
    coefficients = np.real(np.poly(d.loop.poles))
    trail = simulate_law(a, b, d.gain, rng.normal(size=n), rng.normal(size=m), 40)
    order = n + m
    for k in range(40 - order):
        residual = sum(coefficients[i] * trail[k + order - i] for i in range(order + 1))
        assert np.abs(residual).max() < 1e-9 * max(1.0, np.abs(trail).max())


def test_simulated_decay_follows_the_spectral_radius(rng):
    # The norm of a stable loop's trajectory decays like rho^k (common practice).
    a, b, c = random_plant(rng, 3, 1, 1, radius=0.9)
    d = design_controller(a, b, c, output_weight=[1.0], move_weight=[1.0], prediction=30, control=3)
    assert d.loop.stable
    trail = simulate_law(a, b, d.gain, rng.normal(size=3), rng.normal(size=1), 400)
    norms = np.linalg.norm(trail, axis=1)
    rate = (norms[399] / norms[300]) ** (1 / 99)
    assert abs(rate - d.loop.spectral_radius) < 0.02


def test_warnings_for_an_unstable_closed_loop():
    # An open-loop unstable plant (pole 2) with heavy move suppression and Hp = 1 is not stabilised.
    d = design_controller([[2.0]], [[1.0]], [[1.0]], output_weight=[1.0], move_weight=[1000.0], prediction=1, control=1)
    codes = [w.code for w in d.warnings]
    assert not d.loop.stable and d.loop.spectral_radius > 1
    assert "unstable_closed_loop" in codes


def test_warning_for_a_pole_near_the_unit_circle():
    # An integrating plant with very heavy move suppression leaves a pole just inside z = 1.
    d = design_controller([[1.0]], [[1.0]], [[1.0]], output_weight=[1.0], move_weight=[1e7], prediction=5, control=1)
    codes = [w.code for w in d.warnings]
    assert "pole_near_unit_circle" in codes
    assert d.loop.stable


def test_warning_for_a_near_singular_hessian(rng):
    # Two inputs with (almost) the same effect and a tiny move weight: H is nearly singular.
    a, b, c = random_plant(rng, 3, 1, 1)
    b2 = np.hstack([b, b * (1 + 1e-9)])
    d = design_controller(a, b2, c, output_weight=[1.0], move_weight=[1e-9, 1e-9], prediction=20, control=4)
    assert d.hessian.condition_number > 1e8
    assert "ill_conditioned_hessian" in [w.code for w in d.warnings]


def test_a_benign_design_has_no_warnings(rng):
    a, b, c = random_plant(rng, 3, 2, 2, radius=0.8)
    d = design_controller(a, b, c, output_weight=[1.0, 1.0], move_weight=[0.5, 0.5], prediction=20, control=4)
    assert d.warnings == []
