"""POST /simulate with the Riccati terminal weight, through the HTTP layer.

References: the infinite-horizon LQR gain of the incremental system from
``scipy.linalg.solve_discrete_are`` (``tests.references.incremental_lqr``); the standard result
of dynamic programming that with the Riccati cost to go and ``Hu = Hp`` the first move is the
LQR move ``du = -K (xi - xi_s)`` on the deviation from the steady-state target ``xi_s``, here
solved by hand from the target equations ``(I - A) x_s = B u_s``, ``C x_s = r`` (Muske and
Badgwell 2002) with ``numpy.linalg.solve``.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from service.pipeline.examples import load_example
from tests.references import incremental_lqr

EXAMPLE = load_example("simulate_request.json")
A, B, C = (np.array(EXAMPLE["model"][k], dtype=float) for k in "abc")
Q, R = np.diag(EXAMPLE["weights"]["output"]), np.diag(EXAMPLE["weights"]["move"])
SETPOINT = np.array([1.0, -0.5])


def _body(horizon=6, steps=150, kind="full_state"):
    body = copy.deepcopy(EXAMPLE)
    body["weights"]["terminal"] = "riccati"
    body["horizons"] = {"prediction": horizon, "control": horizon, "first_penalized": 1}
    body["estimator"] = {"kind": kind}
    body["scenario"] = {"steps": steps, "setpoint_changes": [{"step": 5, "setpoint": SETPOINT.tolist()}]}
    return body


def _post(client, body):
    r = client.post("/simulate", json=body)
    assert r.status_code == 200, r.text
    return r.json()


@pytest.mark.parametrize("horizon", [1, 6])
def test_simulate_with_the_riccati_terminal_weight_and_hu_equal_to_hp_is_the_lqr_loop(client, horizon):
    run = _post(client, _body(horizon))
    lqr, _, _ = incremental_lqr(A, B, C, Q, R)  # scipy.linalg.solve_discrete_are
    target = np.linalg.solve(np.block([[np.eye(4) - A, -B], [C, np.zeros((2, 2))]]), np.r_[np.zeros(4), SETPOINT])
    x, u, inputs = np.zeros(4), np.zeros(2), []
    for k in range(150):
        xi_s = target if k >= 5 else np.zeros(6)
        u = u - lqr @ (np.concatenate([x, u]) - xi_s)  # the LQR law on the target deviation
        inputs.append(u)
        x = A @ x + B @ u
    np.testing.assert_allclose(np.array(run["inputs"]), np.array(inputs), rtol=0, atol=1e-9)
    # offset-free: the outputs settle on the setpoint, the inputs on the target's inputs
    np.testing.assert_allclose(run["outputs"][-1], SETPOINT, atol=1e-8)
    np.testing.assert_allclose(run["inputs"][-1], target[4:], atol=1e-8)
    assert run["design"]["closed_loop"]["stable"]


@pytest.mark.parametrize("move_steps", [None, [0, 2, 4]], ids=["every move", "move blocking"])
def test_simulate_riccati_under_wide_limits_is_the_unconstrained_run(client, move_steps):
    body = _body(8, kind="output_disturbance", steps=300)
    body["horizons"]["control"] = 3 if move_steps is None else 6
    if move_steps is not None:
        body["horizons"]["move_steps"] = move_steps
    body["scenario"]["output_disturbances"] = [{"step": 60, "value": [0.3, 0.2]}]
    free = _post(client, body)
    body["limits"] = {
        "input_min": [-1e4, -1e4],
        "input_max": [1e4, 1e4],
        "move_max": [1e4, 1e4],
        "output_min": [-1e4, -1e4],
        "output_max": [1e4, 1e4],
    }
    limited = _post(client, body)
    np.testing.assert_allclose(np.array(limited["inputs"]), np.array(free["inputs"]), rtol=0, atol=1e-12)
    np.testing.assert_allclose(free["outputs"][-1], SETPOINT, atol=1e-6)  # offset-free after the bias


def test_simulate_riccati_under_a_binding_move_limit_moves_no_faster_than_the_limit(client):
    body = _body(8, kind="output_disturbance", steps=200)
    body["horizons"]["control"] = 3
    body["limits"] = {"move_max": [0.05, 0.05]}
    run = _post(client, body)
    moves = np.diff(np.vstack([np.zeros(2), np.array(run["inputs"])]), axis=0)
    assert np.abs(moves).max() <= 0.05 + 1e-9
    assert np.abs(moves).max() > 0.05 - 1e-6  # the limit did bind
    np.testing.assert_allclose(run["outputs"][-1], SETPOINT, atol=1e-6)


BD = [[0.05], [0.0], [0.02], [0.0]]  # a measured feed disturbance (invented)


@pytest.mark.parametrize("horizon", [2, 6])
def test_design_feedforward_gain_with_the_riccati_terminal_weight_is_minus_k_s_m(client, horizon):
    # With Hu = Hp the law is the LQR law on the deviation from the steady state under the
    # held disturbance, du = -K (xi - xi_s(r, d)) (dynamic programming; K from
    # scipy.linalg.solve_discrete_are), so its feed-forward gain (du = ... - Kd d) is
    # Kd = -K S_m with S_m from the target equations (I - A) x = B u + Bd d, C x = 0, solved by hand.
    body = _body(horizon)
    body["model"]["b_disturbance"] = BD
    body["model"]["disturbances"] = [{"name": "feed_flow", "unit": "t/h"}]
    design = {k: body[k] for k in ("model", "horizons", "weights")}
    r = client.post("/design", json=design)
    assert r.status_code == 200, r.text
    gain = r.json()["gain"]
    lqr, _, _ = incremental_lqr(A, B, C, Q, R)
    target = np.block([[np.eye(4) - A, -B], [C, np.zeros((2, 2))]])
    s_m = np.linalg.solve(target, np.vstack([np.array(BD), np.zeros((2, 1))]))
    np.testing.assert_allclose(np.array(gain["disturbance"]), -lqr @ s_m, rtol=0, atol=1e-9)
    np.testing.assert_allclose(np.hstack([gain["state"], gain["previous_input"]]), lqr, rtol=0, atol=1e-9)


@pytest.mark.parametrize("kind", ["kalman", "full_state"])
def test_riccati_with_measured_outputs_of_their_own_exports_simulate_s_law(client, kind):
    # The plant of tests/api/test_measured_outputs.py (an unmeasured controlled output, invented
    # numbers): the exported law run by scipy.signal.dlsim on /simulate's measurements (or
    # states, for full_state) and setpoints gives /simulate's inputs with the terminal term.
    import scipy.signal

    from tests.api.test_measured_outputs import _body as measured_body

    body = measured_body(noise=False)
    body["weights"]["terminal"] = "riccati"
    if kind == "full_state":
        body["estimator"] = {"kind": "full_state"}
    sim = _post(client, body)
    fields = {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator")}
    r = client.post("/design/export", json={**fields, "format": "state_space"})
    assert r.status_code == 200, r.text
    law = r.json()
    read = np.array(sim["estimates"] if kind == "full_state" else sim["measured"])
    w = np.hstack([read, np.array(sim["setpoints"])])
    system = tuple(np.array(law[k]["values"], dtype=float) for k in "abcd")
    _, v, _ = scipy.signal.dlsim((*system, law["sample_time"]), w)
    u = np.array(sim["inputs"])
    np.testing.assert_allclose(v[:, :1], u, rtol=0, atol=1e-9 * np.abs(u).max())
    if kind == "kalman":  # offset-free through the input-disturbance model (full_state has none)
        assert abs(sim["outputs"][-1][0] - 1.0) < 1e-3  # the unmeasured output held on its setpoint


@pytest.mark.parametrize("scale", [1e-9, 1e-6, 1e6, 1e9])
def test_the_riccati_design_does_not_depend_on_the_inputs_units(client, scale):
    # Inputs in other units, u' = u / s: B' = s B and R' = s^2 R pose the same problem, whose
    # gains in the new units are the old ones over s (a change of variables). With Hu = Hp the
    # first move is the LQR move of the incremental system (dynamic programming; reference:
    # scipy.linalg.solve_discrete_are). Found in an audit of hostile input: at s = 1e-9 and from
    # s = 1e6 on the Riccati weight was refused as not existing ("the mode at z = 1 cannot be
    # moved by the inputs"), the equation's checks being made in the request's units.
    body = load_example("design_request.json")
    body["weights"]["terminal"] = "riccati"
    body["horizons"] = {"prediction": 6, "control": 6, "first_penalized": 1}
    a, b, c = (np.array(body["model"][k], dtype=float) for k in "abc")
    q, r = np.diag(body["weights"]["output"]), np.diag(body["weights"]["move"])
    body["model"]["b"] = (b * scale).tolist()
    body["weights"]["move"] = (np.diag(r) * scale**2).tolist()
    answer = client.post("/design", json=body)
    assert answer.status_code == 200, answer.text
    gain = answer.json()["gain"]
    lqr = incremental_lqr(a, b, c, q, r)[0]  # in the original units
    n = a.shape[0]
    np.testing.assert_allclose(np.array(gain["state"]) * scale, lqr[:, :n], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(np.array(gain["previous_input"]), lqr[:, n:], rtol=1e-6, atol=1e-9)


def _spare_valve_body(*, steps=200, limits=False):
    """The example plant with a third valve that acts as the first one does on both outputs, at half
    its strength: u1 - 2 u3 leaves every output unchanged (m > p), steered by input targets."""
    body = _body(6, steps=steps)
    body["model"]["b"] = [[*row, 0.5 * row[0]] for row in EXAMPLE["model"]["b"]]
    body["model"]["inputs"].append({"name": "spare_valve", "unit": "%"})
    body["weights"]["move"] = [*EXAMPLE["weights"]["move"], 0.2]
    body["weights"]["input"] = [0.02, 0.03, 0.05]
    body["scenario"]["input_targets"] = [0.0, 0.0, 0.0]
    body["scenario"]["input_target_changes"] = [{"step": 80, "value": [0.0, 0.0, 0.6]}]
    if limits:
        body["limits"] = {"input_min": [-1e4] * 3, "input_max": [1e4] * 3, "move_max": [1e4] * 3}
    return body


def test_a_spare_valve_with_an_input_target_takes_the_riccati_terminal_weight_and_runs_the_lqr_loop(client):
    # Found in a review of the layouts with spare inputs: the Riccati terminal weight was refused
    # whenever a design had more inputs than outputs or input targets. With input targets the
    # stage cost sees the spare direction, so the stabilizing solution exists. Reference: the
    # LQR gain of the cost with a cross term from python-control's dlqr (Q_i = C_i'QC_i +
    # E_u'SE_u, R + S, N = E_u'S), its loop written out here on the target deviation with the
    # steady state from numpy.linalg.lstsq/solve of the target equations (S-weighted, by hand).
    control = pytest.importorskip("control")
    from service.solver.design.terminal import incremental_system

    body = _spare_valve_body()
    run = _post(client, body)
    b = np.array(body["model"]["b"], dtype=float)
    s = np.diag(body["weights"]["input"])
    r = np.diag(body["weights"]["move"])
    ai, bi, ci = incremental_system(A, b, C)
    e_u = np.hstack([np.zeros((3, 4)), np.eye(3)])
    k, _, _ = control.dlqr(ai, bi, ci.T @ Q @ ci + e_u.T @ s @ e_u, r + s, e_u.T @ s)
    to_state = np.linalg.solve(np.eye(4) - A, b)
    g0 = C @ to_state
    s_inv = np.linalg.inv(s)

    def steady(setpoint, targets):  # min |u - u_t|_S subject to G0 u = r (Lagrange multipliers)
        u = targets + s_inv @ g0.T @ np.linalg.solve(g0 @ s_inv @ g0.T, setpoint - g0 @ targets)
        return np.concatenate([to_state @ u, u])

    x, u, inputs = np.zeros(4), np.zeros(3), []
    for step in range(200):
        setpoint = SETPOINT if step >= 5 else np.zeros(2)
        targets = np.array([0.0, 0.0, 0.6]) if step >= 80 else np.zeros(3)
        u = u - k @ (np.concatenate([x, u]) - steady(setpoint, targets))
        inputs.append(u)
        x = A @ x + b @ u
    np.testing.assert_allclose(np.array(run["inputs"]), np.array(inputs), rtol=0, atol=1e-9)
    # offset-free, and the spare valve settles where the targets and the setpoint put it
    np.testing.assert_allclose(run["outputs"][-1], SETPOINT, atol=1e-8)
    np.testing.assert_allclose(run["inputs"][-1], steady(SETPOINT, np.array([0.0, 0.0, 0.6]))[4:], atol=1e-8)
    assert run["design"]["closed_loop"]["stable"] and run["design"]["closed_loop"]["marginal_modes"] == []
    # the move QP under limits that never bind gives the same run (its terminal target takes the
    # input targets as the fixed law does)
    limited = _post(client, _spare_valve_body(limits=True))
    np.testing.assert_allclose(np.array(limited["inputs"]), np.array(run["inputs"]), rtol=0, atol=1e-9)


def test_a_spare_valve_without_input_targets_is_refused_the_terminal_weight_naming_the_remedy(client):
    body = _spare_valve_body()
    del body["weights"]["input"]
    del body["scenario"]
    answer = client.post("/design", json=body)
    assert answer.status_code == 422, answer.text
    problems = {e["pointer"]: e["detail"] for e in answer.json()["errors"]}
    assert "z = 1" in problems["/weights/terminal"] and "weights.input" in problems["/weights/terminal"]
