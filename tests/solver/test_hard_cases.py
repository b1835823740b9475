"""The hard cases of issue 13 that are not about the closed loop's spectrum.

Each check names its independent reference beside it.
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from service.solver.models.properties import integrating_poles, steady_state_gain
from service.solver.models.sampling import sample_zero_order_hold


def test_fast_sampled_long_lag_is_not_integrating():
    """A 200 s lag sampled at 1 ms settles (issue 13, item 7); reference: python-control dcgain."""
    a, b = np.array([[-1 / 200.0]]), np.array([[1.5 / 200.0]])  # gain 1.5, time constant 200 s
    c = np.array([[1.0]])
    sampled = control.c2d(control.ss(a, b, c, 0), 1e-3, method="zoh")
    ad, bd = np.asarray(sampled.A), np.asarray(sampled.B)
    result = steady_state_gain(ad, bd, c)
    assert result.integration_order[0, 0] == 0
    assert result.gain[0, 0] == pytest.approx(float(np.squeeze(sampled.dcgain())), rel=1e-9)
    assert result.gain[0, 0] == pytest.approx(1.5, rel=1e-9)  # the continuous gain (textbook)


@pytest.mark.parametrize("sample_time", [1e-3, 1.0, 100.0])
def test_integrators_found_at_any_sample_time(sample_time):
    """A level (1/s), a double integrator and a lag of 10^5 s, sampled exactly (scipy expm via the service)."""
    a = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, -1e-5]])
    b = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [0.0, 1e-5]])
    sampled = sample_zero_order_hold(a, b, sample_time=sample_time)
    ad, bd = sampled.a, sampled.b
    # integrators: the double integrator (2) and the level (1); the 10^5 s lag is a lag at
    # every sample time here (1 - z = Ts 1e-5 >= 1e-8), python-control's poles agree
    assert integrating_poles(ad) == 3
    poles = control.ss(ad, bd, np.eye(4), 0, sample_time).poles()
    assert sum(abs(z - 1) < 1e-12 for z in poles) >= 1


def _dead_time_request(dead_time: float, prediction: int) -> dict:
    return {
        "model": {
            "kind": "transfer_matrix",
            "sample_time": 1.0,
            "elements": [
                [
                    {"gain": 2.0, "time_constants": [10.0], "dead_time": dead_time},
                    {"gain": 0.5, "time_constants": [4.0], "dead_time": 1.0},
                ]
            ],
            "inputs": [{"name": "steam_valve", "unit": "%"}, {"name": "bypass_valve", "unit": "%"}],
            "outputs": [{"name": "outlet_temperature", "unit": "degC"}],
        },
        "horizons": {"prediction": prediction, "control": 3},
        "weights": {"output": [1.0], "move": [0.1, 0.1]},
    }


def test_dead_time_beyond_horizon_names_the_pair(client):
    """Dead time 15.5 with Hp 10 (issue 13, item 5): the pair is named and the horizon it needs given.

    Reference: the sampled step response of a lag delayed 15.5 samples is zero up to sample 15
    and nonzero from sample 16 (the continuous response starts at t = 15.5; modified
    z-transform, textbook); the 2 % settling of a first-order lag takes about 4 time
    constants (textbook), here 40 samples.
    """
    answer = client.post("/design", json=_dead_time_request(15.5, 10))
    assert answer.status_code == 200, answer.text
    found = [w for w in answer.json()["warnings"] if w["code"] == "dead_time_beyond_horizon"]
    assert len(found) == 1
    message = found[0]["message"]
    assert "outlet_temperature first responds to steam_valve 16 samples after a move" in message
    assert "bypass_valve" not in message  # that pair is reached
    assert "at least 56" in message  # 16 + 4 * 10
    # the fix works: with that horizon the warning is gone
    fixed = client.post("/design", json=_dead_time_request(15.5, 56)).json()
    assert "dead_time_beyond_horizon" not in [w["code"] for w in fixed["warnings"]]


def test_every_gain_zero_is_said(client):
    body = _dead_time_request(15.5, 10)
    body["model"]["elements"] = [[body["model"]["elements"][0][0]]]
    body["model"]["inputs"] = body["model"]["inputs"][:1]
    body["weights"]["move"] = [0.1]
    answer = client.post("/design", json=body).json()
    message = next(w["message"] for w in answer["warnings"] if w["code"] == "dead_time_beyond_horizon")
    assert "every gain is zero" in message


@pytest.mark.parametrize(("first_penalized", "equal"), [(1, True), (3, False)])
def test_riccati_terminal_weight_is_lqr_only_from_the_first_step(first_penalized, equal):
    """Issue 13, item 8: with Hu = Hp the Riccati terminal weight gives the LQR gain only for Hw = 1.

    Reference: the infinite-horizon LQR gain of the incremental system from
    ``scipy.linalg.solve_discrete_are``; the plant is invented (a lag and an integrating level).
    """
    import scipy.linalg

    from service.solver.design.controller import design_controller

    a = np.array([[0.9, 0.0], [0.1, 1.0]])
    b = np.array([[0.2], [0.0]])
    c = np.array([[0.0, 1.0]])
    ai = np.block([[a, b], [np.zeros((1, 2)), np.eye(1)]])
    bi = np.vstack([b, np.eye(1)])
    ci = np.hstack([c, np.zeros((1, 1))])
    q, r = np.eye(1), 0.5 * np.eye(1)
    p = scipy.linalg.solve_discrete_are(ai, bi, ci.T @ q @ ci, r)
    lqr = np.linalg.solve(r + bi.T @ p @ bi, bi.T @ p @ ai)
    design = design_controller(
        a,
        b,
        c,
        output_weight=[1.0],
        move_weight=[0.5],
        prediction=6,
        control=6,
        first_penalized=first_penalized,
        terminal="riccati",
    )
    gain = np.hstack([design.gain.state, design.gain.previous_input])
    assert np.allclose(gain, lqr, rtol=1e-8, atol=1e-10) is equal
