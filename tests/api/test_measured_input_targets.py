"""Input targets together with measured disturbances (feed-forward), with and without the Riccati terminal weight.

A measured disturbance held at its value moves the steady state the outputs need, and with it
the target's inputs: ``u_s = U_r r + U_t u_t + U_m d_m``.  Found in a review of the Riccati
terminal weight with input targets: the input-target pull had left ``U_m d_m`` out (in /design's
feed-forward gain, /simulate's runs and the exported law), so a measured disturbance step left
the outputs off their setpoints on the exact model.

Invented plant of our own: a blending tank with a cold feed, a hot feed and a recycle valve (three
manipulated variables) for temperature and level (two controlled outputs), and a measured
upstream flow.  References: the steady-state target by hand (the equality-constrained least
squares ``min |u - u_t|_S`` subject to the steady state and ``C x = r``, solved as its KKT system
by ``numpy.linalg.solve``, textbook Lagrange multipliers); the first move of the horizon cost
written out move by move and minimised by ``numpy.linalg.lstsq``, with the terminal weight
``P`` from slycot's ``sb02od`` (its discrete Riccati equation with the cross term ``L``).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

A = np.array([[0.85, 0.05, 0.0], [0.0, 0.7, 0.1], [0.02, 0.0, 0.6]])
B = np.array([[0.4, -0.3, 0.1], [0.2, 0.3, 0.25], [0.0, 0.1, -0.2]])
C = np.array([[1.0, 0.0, 0.5], [0.0, 1.0, 0.0]])
BD = np.array([[0.3], [-0.2], [0.1]])
Q = np.diag([1.0, 2.0])
R = np.diag([0.3, 0.2, 0.5])
S = np.array([[0.2, 0.05, 0.0], [0.05, 0.3, -0.04], [0.0, -0.04, 0.25]])  # a full input weight
SETPOINT = np.array([1.0, -0.5])
INPUT_TARGET = np.array([0.2, 0.0, -0.3])
FLOW = np.array([1.5])

BODY = {
    "model": {
        "kind": "state_space",
        "a": A.tolist(),
        "b": B.tolist(),
        "c": C.tolist(),
        "b_disturbance": BD.tolist(),
        "inputs": [{"name": "cold_feed"}, {"name": "hot_feed"}, {"name": "recycle_valve"}],
        "outputs": [{"name": "tank_temperature"}, {"name": "tank_level"}],
        "disturbances": [{"name": "upstream_flow"}],
        "sample_time": 1.0,
    },
    "horizons": {"prediction": 8, "control": 8},
    "weights": {"output": [1.0, 2.0], "move": [0.3, 0.2, 0.5], "input": S.tolist()},
    "estimator": {"kind": "full_state"},
    "scenario": {
        "steps": 150,
        "setpoint_changes": [{"step": 2, "setpoint": SETPOINT.tolist()}],
        "measured_disturbances": [{"step": 40, "value": FLOW.tolist()}],
        "input_targets": INPUT_TARGET.tolist(),
    },
}

LAYOUTS = {
    "no terminal weight": {},
    "Riccati terminal weight": {"terminal": "riccati"},
    "Riccati, Hu < Hp, Hw = 2, blocked moves": {
        "terminal": "riccati",
        "horizons": {"prediction": 10, "control": 4, "first_penalized": 2, "move_steps": [0, 1, 3]},
    },
}


def _body(layout, **scenario):
    body = copy.deepcopy(BODY)
    extra = LAYOUTS[layout]
    if "terminal" in extra:
        body["weights"]["terminal"] = extra["terminal"]
    if "horizons" in extra:
        body["horizons"] = extra["horizons"]
    body["scenario"].update(scenario)
    return body


def _hand_target(r, ut, dm):
    """[x_s; u_s]: min |u - u_t|_S subject to (I - A) x = B u + Bd d_m and C x = r (KKT system, numpy)."""
    n, m, p = 3, 3, 2
    e = np.block([[np.eye(n) - A, -B], [C, np.zeros((p, m))]])
    h = np.zeros((n + m, n + m))
    h[n:, n:] = S
    kkt = np.block([[h, e.T], [e, np.zeros((n + p, n + p))]])
    rhs = np.concatenate([np.zeros(n), S @ ut, BD @ dm, r])
    return np.linalg.solve(kkt, rhs)[: n + m]


def _reference_first_move(horizons, terminal, x, u_prev, r, ut, dm):
    """The first move of the horizon cost written out (module notes of the service's terminal and
    input-target modules): sum over Hw..Hp-1 of |z - r|_Q, the terminal |xi(Hp) - xi_s|_P (Q on
    z(Hp) without it), |du|_R and |u - u_s|_S over the control horizon; minimised by lstsq."""
    hp, hu = horizons["prediction"], horizons["control"]
    hw = horizons.get("first_penalized", 1)
    free = horizons.get("move_steps", list(range(hu)))
    n, m = B.shape
    xi_s = _hand_target(r, ut, dm)
    if terminal:
        import slycot

        a_i = np.block([[A, B], [np.zeros((m, n)), np.eye(m)]])
        b_i = np.vstack([B, np.eye(m)])
        c_i = np.hstack([C, np.zeros((2, m))])
        e_u = np.hstack([np.zeros((m, n)), np.eye(m)])
        p_matrix = slycot.sb02od(n + m, m, a_i, b_i, c_i.T @ Q @ c_i + e_u.T @ S @ e_u, R + S, "D", L=e_u.T @ S)[0]
        w, v = np.linalg.eigh(p_matrix)
        root_p = (v * np.sqrt(np.clip(w, 0.0, None))).T
    root_q, root_r = np.linalg.cholesky(Q).T, np.linalg.cholesky(R).T
    root_s = np.linalg.cholesky(S).T

    def residual(moves):
        du = np.zeros((hu, m))
        du[free] = moves.reshape(len(free), m)
        rows, state, u = [], x.copy(), u_prev.copy()
        for i in range(1, hp + 1):
            u = u + (du[i - 1] if i - 1 < hu else 0.0)
            if i - 1 < hu:
                rows.append(root_r @ du[i - 1])
                rows.append(root_s @ (u - xi_s[n:]))
            state = A @ state + B @ u + BD @ dm
            if i == hp and terminal:
                rows.append(root_p @ (np.concatenate([state, u]) - xi_s))
            elif i >= hw:
                rows.append(root_q @ (C @ state - r))
        return np.concatenate(rows)

    base = residual(np.zeros(len(free) * m))
    jac = np.column_stack([residual(e) - base for e in np.eye(len(free) * m)])
    return np.linalg.lstsq(jac, -base, rcond=None)[0][:m]


@pytest.mark.parametrize("layout", LAYOUTS)
def test_a_measured_disturbance_step_leaves_no_offset_and_the_inputs_on_the_target(client, layout):
    run = client.post("/simulate", json=_body(layout))
    assert run.status_code == 200, run.text
    run = run.json()
    np.testing.assert_allclose(run["outputs"][-1], SETPOINT, rtol=0, atol=1e-8)
    np.testing.assert_allclose(run["inputs"][-1], _hand_target(SETPOINT, INPUT_TARGET, FLOW)[3:], rtol=0, atol=1e-8)


@pytest.mark.parametrize("layout", LAYOUTS)
def test_the_design_s_gains_give_the_first_move_of_the_written_out_horizon_cost(client, layout):
    pytest.importorskip("slycot")
    body = _body(layout)
    answer = client.post("/design", json={k: body[k] for k in ("model", "horizons", "weights")})
    assert answer.status_code == 200, answer.text
    gain = {k: np.array(v) for k, v in answer.json()["gain"].items() if k != "labels" and v is not None}
    rng = np.random.default_rng(16)
    for _ in range(3):
        x, u_prev, r, ut, dm = (rng.standard_normal(k) for k in (3, 3, 2, 3, 1))
        got = (
            gain["setpoint"] @ r
            + gain["input_target"] @ ut
            - gain["state"] @ x
            - gain["previous_input"] @ u_prev
            - gain["disturbance"] @ dm
        )
        want = _reference_first_move(body["horizons"], "terminal" in body["weights"], x, u_prev, r, ut, dm)
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9 * max(1.0, np.abs(want).max()))


@pytest.mark.parametrize("layout", LAYOUTS)
def test_limits_that_never_bind_give_the_same_run_with_a_measured_disturbance(client, layout):
    free = client.post("/simulate", json=_body(layout, steps=80)).json()
    body = _body(layout, steps=80)
    body["limits"] = {"input_min": [-1e4] * 3, "input_max": [1e4] * 3, "move_max": [1e4] * 3}
    limited = client.post("/simulate", json=body)
    assert limited.status_code == 200, limited.text
    np.testing.assert_allclose(limited.json()["inputs"], free["inputs"], rtol=0, atol=1e-9)
