"""Closed-loop poles with long dead times, against an 80-digit computation.

Reference: ``tests/solver/mp_reference.py`` designs the controller again in 80-digit
arithmetic (mpmath) from the same model matrices and takes the roots of the closed loop's
characteristic polynomial (matrix determinant lemma); the roots at zero are those whose
coefficients vanish to 1e-60.  Case: gain 2, time constant 10, sample time 1, dead times of
0.5 to 300.5 samples (invented numbers; a long transport delay is a practitioners' layout).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from service.solver.design.controller import design_controller
from service.solver.models.transfer import TransferElement, transfer_matrix_model
from service.solver.numerics import feedback_poles
from tests.solver.mp_reference import closed_loop_polynomial, closed_loop_roots, siso_gain


def _case(dead_time: float, prediction: int):
    model = transfer_matrix_model(
        [[TransferElement(gain=2.0, time_constants=(10.0,), dead_time=dead_time)]], sample_time=1.0
    )
    design = design_controller(
        model.a, model.b, model.c, output_weight=[1.0], move_weight=[0.1], prediction=prediction, control=3
    )
    return model, design


@pytest.mark.parametrize(("dead_time", "prediction"), [(0.5, 30), (30.0, 60), (100.5, 130), (300.5, 330)])
def test_spectral_radius_matches_80_digit_loop(dead_time, prediction):
    model, design = _case(dead_time, prediction)
    kx, ku = siso_gain(model.a, model.b, model.c, q=1.0, r=0.1, prediction=prediction, control=3)
    roots, zeros, dropped = closed_loop_roots(closed_loop_polynomial(model.a, model.b, kx, ku))
    exact_radius = max(abs(z) for z in roots)
    # mpmath, 80 digits: the accuracy requirement is 1e-6; the structured computation does far better
    assert abs(design.loop.spectral_radius - exact_radius) < 1e-10
    # every pole away from zero is one of the exact roots, and the rest sit at zero
    moved = [z for z in design.loop.poles if abs(z) > 1e-6]
    assert len(moved) == len(roots) - sum(abs(z) < 1e-6 for z in roots)
    for z in moved:
        assert min(abs(z - w) for w in roots) < 1e-9
    assert len(design.loop.poles) - len(moved) >= zeros
    assert dropped < 1e-60


def test_plain_eigenvalues_smear_the_delay_cluster():
    """The failure this guards against: LAPACK on the whole matrix reports a ring near 0.7 (issue 13)."""
    _, design = _case(100.5, 130)
    plain = np.abs(scipy.linalg.eigvals(design.loop.matrix)).max()
    assert plain > 0.6 > design.loop.spectral_radius + 0.05


def test_same_radius_as_the_short_dead_time():
    """The controller predicts through the delay: the moved poles do not depend on it (predictor structure)."""
    radii = [_case(dt, 30 + int(dt))[1].loop.spectral_radius for dt in (0.5, 50.5, 200.5)]
    assert np.ptp(radii) < 1e-12


@pytest.mark.parametrize("seed", range(6))
def test_generic_loops_equal_plain_eigenvalues(seed):
    """Without hidden states the decomposition is the plain eigenvalue problem (scipy.linalg.eigvals)."""
    rng = np.random.default_rng(seed)
    n, m = 6, 2
    a = rng.normal(size=(n, n)) / np.sqrt(n)
    b = rng.normal(size=(n, m))
    k = rng.normal(size=(m, n))
    found = feedback_poles(a, b, k)
    reference = scipy.linalg.eigvals(a - b @ k)
    assert found.seen == n
    np.testing.assert_allclose(np.sort_complex(found.poles), np.sort_complex(reference), atol=1e-12)


@pytest.mark.parametrize("seed", range(6))
def test_hidden_block_keeps_its_open_loop_poles(seed):
    """States the gain never sees keep their open-loop poles; all poles agree with scipy.linalg.eigvals."""
    rng = np.random.default_rng(seed)
    n1, n2, m = 4, 3, 2
    a11 = rng.normal(size=(n1, n1)) / 2
    a22 = rng.normal(size=(n2, n2)) / 2
    a21 = rng.normal(size=(n2, n1))
    a = np.block([[a11, np.zeros((n1, n2))], [a21, a22]])
    b = rng.normal(size=(n1 + n2, m))
    k = np.hstack([rng.normal(size=(m, n1)), np.zeros((m, n2))])
    t = scipy.linalg.qr(rng.normal(size=(n1 + n2, n1 + n2)))[0]  # hide the structure
    found = feedback_poles(t @ a @ t.T, t @ b, k @ t.T)
    assert found.seen == n1
    reference = scipy.linalg.eigvals(a - b @ k)
    distance = np.abs(found.poles[:, None] - reference[None, :])
    assert distance.min(axis=1).max() < 1e-9
    assert found.pairing_error < 1e-9


def test_rescaled_states_do_not_change_the_poles():
    """A change of units of the states (a diagonal similarity) leaves the poles alone (issue 13, item 4)."""
    model, design = _case(100.5, 130)
    n, m = model.b.shape
    a = np.block([[model.a, model.b], [np.zeros((m, n)), np.eye(m)]])
    b = np.vstack([model.b, np.eye(m)])
    k = np.hstack([design.gain.state, design.gain.previous_input])
    d = 10.0 ** np.linspace(-6, 6, n + m)
    found = feedback_poles(a * (1 / d)[:, None] * d[None, :], b / d[:, None], k * d[None, :])
    assert abs(found.spectral_radius - design.loop.spectral_radius) < 1e-12


def test_design_endpoint_reports_the_exact_radius(client):
    """POST /design with dead time 100.5 answers the 80-digit radius of the short dead time (issue 13)."""
    body = {
        "model": {
            "kind": "transfer_matrix",
            "sample_time": 1.0,
            "elements": [[{"gain": 2.0, "time_constants": [10.0], "dead_time": 100.5}]],
        },
        "horizons": {"prediction": 130, "control": 3},
        "weights": {"output": [1.0], "move": [0.1]},
    }
    answer = client.post("/design", json=body)
    assert answer.status_code == 200, answer.text
    loop = answer.json()["closed_loop"]
    _, short = _case(0.5, 30)
    assert abs(loop["spectral_radius"] - short.loop.spectral_radius) < 1e-10
    assert sum(abs(complex(p["real"], p["imag"])) > 1e-6 for p in loop["poles"]) == 2
