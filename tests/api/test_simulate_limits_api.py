"""Limits through the HTTP layer: /simulate under limits, /design's limit check, bad input.

Sources named beside each check: the control law of the design notes
``du(k) = Kr r - Kx x(k) - Ku u(k-1)``; the steady state ``x_s = (I - A)^-1 B u_s`` of a
stable plant (common practice) and ``scipy.optimize.lsq_linear`` (bounded least squares,
scipy as the reference library) for the nearest reachable steady state in the weighted sense;
the change of units behind scaling (common practice); RFC 4180 for CSV.
"""

from __future__ import annotations

import copy
import csv
import io

import numpy as np
import pytest
import scipy.optimize

from service.pipeline.examples import load_example
from service.solver.limits.bounds import DEFAULT_OUTPUT_SOFTNESS

EXAMPLE = load_example("simulate_request.json")
A, B, C = (np.array(EXAMPLE["model"][k]) for k in ("a", "b", "c"))
#: Spans on every signal (invented), so that each check also covers the scaling of limits.
INPUT_SPAN, OUTPUT_SPAN = np.array([20.0, 5.0]), np.array([4.0, 0.5])
TOL = 1e-9


def request(steps=120, kind="full_state", limits=None, spans=True, **scenario):
    """The example plant with spans, no mismatch and no noise, a scenario and limits."""
    body = copy.deepcopy(EXAMPLE)
    body["model"]["inputs"] = [{"name": "steam", "span": 20.0}, {"name": "outlet", "span": 5.0}]
    body["model"]["outputs"] = [{"name": "temperature", "span": 4.0}, {"name": "level", "span": 0.5}]
    if not spans:
        for key in ("inputs", "outputs"):
            for tag in body["model"][key]:
                tag.pop("span")
    body["estimator"] = {"kind": kind}
    body["scenario"] = {"steps": steps, **scenario}
    if limits is not None:
        body["limits"] = limits
    return body


def post(client, body, path="/simulate", **headers):
    r = client.post(path, json=body, headers=headers)
    assert r.status_code == 200, r.text[:2000]
    return r


def problems(client, body, path="/simulate"):
    r = client.post(path, json=body)
    assert r.status_code == 422, r.text[:2000]
    assert r.headers["content-type"].startswith("application/problem+json")
    return {e["pointer"]: e["detail"] for e in r.json()["errors"]}


def rows_by_step(answer):
    return {row["step"]: row for row in answer["limits"]["steps"]}


def steady_gain():
    """``C (I - A)^-1 B`` of the (stable) example plant, engineering units."""
    return C @ np.linalg.solve(np.eye(A.shape[0]) - A, B)


# --------------------------------------------------------------------------- /simulate


def test_limits_hold_at_every_step_and_soft_outputs_stay_within_the_reported_slack(client):
    # Inputs and moves within their hard limits at every step (engineering units, through the
    # spans).  The run starts with the temperature well above its soft upper limit and the
    # moves too slow to bring it back at once, so the QP must use slack: with the state known
    # and no mismatch the one-step prediction is exact, so z(k+1) <= output_max + slack(k).
    limits = {
        "input_min": [-1.0, -0.6],
        "input_max": [1.0, 0.6],
        "move_max": [0.15, 0.1],
        "output_max": [1.5, None],
        "output_min": [None, -0.4],
    }
    body = request(
        steps=150,
        limits=limits,
        initial={"state": [4.0, 0.0, 0.0, 0.0]},
        setpoint_changes=[{"step": 40, "setpoint": [1.4, -0.3]}, {"step": 100, "setpoint": [-2.0, 0.5]}],
    )
    answer = post(client, body).json()
    u = np.array(answer["inputs"])
    du = np.diff(np.vstack([np.zeros(2), u]), axis=0)
    assert np.all(u >= np.array(limits["input_min"]) - TOL) and np.all(u <= np.array(limits["input_max"]) + TOL)
    assert np.all(np.abs(du) <= np.array(limits["move_max"]) + TOL)
    z = np.array(answer["outputs"])
    rows = rows_by_step(answer)
    used = 0
    for k in range(z.shape[0] - 1):
        row = rows.get(k)
        upper = np.zeros(2) if row is None or row["output_max_slack"] is None else np.array(row["output_max_slack"])
        lower = np.zeros(2) if row is None or row["output_min_slack"] is None else np.array(row["output_min_slack"])
        used += bool(upper.any() or lower.any())
        assert z[k + 1, 0] <= 1.5 + upper[0] + TOL * 10
        assert z[k + 1, 1] >= -0.4 - lower[1] - TOL * 10
    assert used > 0 and z[1, 0] > 1.5  # the slack was needed, and used
    seen = {(a["kind"], a["side"]) for row in answer["limits"]["steps"] for a in row["active"]}
    assert {("move", "min"), ("input", "max")} <= seen, seen
    assert not any(row["fallback"] for row in answer["limits"]["steps"])
    summary = answer["limit_summary"]
    assert summary["fallbacks"] == 0
    largest = {(s["kind"], s["side"], s["signal"]): s for s in summary["signals"]}
    assert largest["output", "max", "temperature"]["largest_slack"] == pytest.approx(
        max((r["output_max_slack"] or [0.0])[0] for r in answer["limits"]["steps"])
    )
    # The summary counts what the step rows list.
    for (kind, side, signal), entry in largest.items():
        at = sum(
            any((a["kind"], a["side"], a["signal"]) == (kind, side, signal) for a in r["active"]) for r in rows.values()
        )
        assert entry["steps_at_limit"] == at and entry["fraction"] == pytest.approx(at / 150)
    assert len(summary["signals"]) == 4 + 4 + 2  # input min/max, both move sides, two output bounds


def test_wide_limits_give_the_unconstrained_trajectory(client):
    # The fixed gain is the special case of the QP (the design notes: without an active limit
    # the QP's minimizer is H^-1 G'QE, whose first move is Kh E): limits that never bind
    # reproduce the run without limits (the move is Kh E itself on such steps).  The run
    # without limits is the fixed law's single linear recursion, so the two agree to rounding.
    scenario = {
        "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}],
        "input_disturbances": [{"step": 60, "value": [0.1, -0.05]}],
        "output_disturbances": [{"step": 120, "value": [0.3, 0.2]}],
        "measurement_noise": {"std": [0.01, 0.02], "seed": 3},
    }
    wide = {
        "input_min": [-1e6, -1e6],
        "input_max": [1e6, 1e6],
        "move_max": [1e6, 1e6],
        "output_min": [-1e6, -1e6],
        "output_max": [1e6, 1e6],
    }
    free = post(client, request(steps=200, kind="output_disturbance", **scenario)).json()
    limited = post(client, request(steps=200, kind="output_disturbance", limits=wide, **scenario)).json()
    for key in ("inputs", "outputs", "measured", "estimates"):
        np.testing.assert_allclose(limited[key], free[key], rtol=1e-11, atol=1e-13, err_msg=key)
    assert free["limits"] is None and free["limit_summary"] is None
    assert limited["limits"]["steps"] == []
    assert all(s["steps_at_limit"] == 0 for s in limited["limit_summary"]["signals"])
    assert limited["limit_summary"]["solver_iterations"] == 0


def test_a_saturating_setpoint_step_settles_on_the_reachable_steady_state_without_windup(client):
    # A setpoint the valves cannot reach.  Reference: the nearest steady state in the weighted
    # sense, min |W S_z^-1 (G_ss u - r)| subject to the input limits, with G_ss = C (I - A)^-1 B
    # and W'W = Q acting on the scaled outputs -- solved by scipy.optimize.lsq_linear.  The run
    # must settle there and, once settled (the plant's slowest mode, 0.95 per sample, decays
    # below the QP's tolerance within some 400 samples), hold no limit active in its QP: it
    # does not keep pushing against a limit (no windup).  It leaves the limit as soon as the
    # setpoint is reachable again.
    low, high = np.array([-0.5, -0.3]), np.array([0.5, 0.3])
    limits = {"input_min": low.tolist(), "input_max": high.tolist(), "move_max": [0.2, 0.2]}
    far = np.array([2.5, -1.5])
    back = np.array([0.3, 0.1])
    body = request(
        steps=800,
        kind="output_disturbance",
        limits=limits,
        setpoint_changes=[{"step": 5, "setpoint": far.tolist()}, {"step": 700, "setpoint": back.tolist()}],
    )
    answer = post(client, body).json()
    gain = steady_gain()
    weight = np.diag(np.sqrt(np.array(EXAMPLE["weights"]["output"])) / OUTPUT_SPAN)
    reference = scipy.optimize.lsq_linear(weight @ gain, weight @ far, bounds=(low, high), method="bvls", tol=1e-14)
    assert reference.success
    u_s, z_s = reference.x, gain @ reference.x
    assert np.any(np.isclose(u_s, low) | np.isclose(u_s, high))  # the target sits on a limit
    u, z = np.array(answer["inputs"]), np.array(answer["outputs"])
    np.testing.assert_allclose(u[699], u_s, atol=1e-9)
    np.testing.assert_allclose(z[699], z_s, atol=1e-9)
    rows = rows_by_step(answer)
    for k in range(680, 700):
        row = rows[k]  # listed because the controller aims at a corrected setpoint
        np.testing.assert_allclose(row["target"], z_s, atol=1e-6)
        assert row["active"] == [] and row["iterations"] == 0 and not row["fallback"]
    assert any(w["code"] == "setpoint_out_of_reach" for w in answer["warnings"])
    assert answer["limit_summary"]["corrected_target_steps"] >= 690
    # Back within reach: the input leaves its limit at once and the loop ends on the setpoint.
    on_limit = np.isclose(u[699], low) | np.isclose(u[699], high)
    assert np.all(np.abs(u[700][on_limit] - u[699][on_limit]) > 1e-3)
    np.testing.assert_allclose(z[-1], back, atol=1e-6)
    assert all(k < 700 for k, row in rows.items() if row["target"] is not None)


def test_moves_blocked_into_free_steps_keep_the_limits(client):
    # Move blocking (the input held between free move steps): the QP in the free moves keeps
    # input and move limits at every step.
    limits = {"input_min": [-0.4, -0.3], "input_max": [0.4, 0.3], "move_max": [0.1, 0.1]}
    body = request(steps=80, limits=limits, setpoint_changes=[{"step": 0, "setpoint": [2.0, -1.0]}])
    body["horizons"]["move_steps"] = [0, 2, 4]
    answer = post(client, body).json()
    u = np.array(answer["inputs"])
    du = np.diff(np.vstack([np.zeros(2), u]), axis=0)
    assert np.all(np.abs(u) <= np.array([0.4, 0.3]) + TOL) and np.all(np.abs(du) <= 0.1 + TOL)
    assert answer["limit_summary"]["fallbacks"] == 0
    assert any(row["active"] for row in answer["limits"]["steps"])


def test_infeasible_hard_output_limits_fall_back_flag_the_steps_and_the_run_goes_on(client):
    # Hard output limits that the slow moves cannot meet from the initial state: the QP is
    # infeasible, so each such step holds the last input (du = 0), is flagged and warned
    # about, and the run still goes to its end.
    limits = {"move_max": [0.01, 0.01], "output_max": [0.5, None], "hard_outputs": True}
    body = request(steps=60, limits=limits, initial={"state": [3.0, 0.0, 0.0, 0.0], "input": [0.2, 0.1]})
    r = post(client, body)
    answer = r.json()
    assert answer["diverged_at"] is None and len(answer["inputs"]) == 60
    failed = [row for row in answer["limits"]["steps"] if row["fallback"]]
    assert failed and failed[0]["step"] == 0 and failed[0]["status"] == "infeasible"
    u = np.array(answer["inputs"])
    previous = np.vstack([[0.2, 0.1], u[:-1]])
    for row in failed:
        np.testing.assert_array_equal(u[row["step"]], previous[row["step"]])  # held
    assert answer["limit_summary"]["fallbacks"] == len(failed)
    assert answer["limit_summary"]["signals"][-1]["largest_slack"] is None  # hard: no slack
    warning = next(w for w in answer["warnings"] if w["code"] == "limits_fallback")
    assert str(len(failed)) in warning["message"] and "infeasible" in warning["message"]
    # The CSV carries the flag and the active-limit count per step.
    rows = list(csv.reader(io.StringIO(post(client, body, accept="text/csv").text)))
    assert rows[0][-2:] == ["limits.fallback", "limits.active"]
    flags = [int(row[-2]) for row in rows[1:]]
    assert [k for k, flag in enumerate(flags) if flag] == [row["step"] for row in failed]


def test_the_limits_example_posts_and_respects_its_limits(client):
    body = load_example("simulate_request_limits.json")
    answer = post(client, body).json()
    limits = body["limits"]
    u = np.array(answer["inputs"])
    du = np.diff(np.vstack([body["scenario"]["initial"]["input"], u]), axis=0)
    assert np.all(u >= np.array(limits["input_min"]) - TOL) and np.all(u <= np.array(limits["input_max"]) + TOL)
    assert np.all(np.abs(du) <= np.array(limits["move_max"]) + TOL)
    assert answer["limits"]["steps"] and answer["limit_summary"]["fallbacks"] == 0
    assert answer["design"]["limit_check"]["violated"] is True
    served = client.get("/openapi.json").json()
    examples = served["paths"]["/simulate"]["post"]["requestBody"]["content"]["application/json"]["examples"]
    assert examples["example_plant_limits"]["value"] == body


# --------------------------------------------------------------------------- /design


def nominal_by_hand(gain, step, steps):
    """The design notes' law on the example plant from rest, for a setpoint step at sample 0."""
    kr, kx, ku = (np.array(gain[k]) for k in ("setpoint", "state", "previous_input"))
    x, u = np.zeros(4), np.zeros(2)
    inputs, outputs = [], []
    for _ in range(steps):
        u = u + kr @ step - kx @ x - ku @ u
        x = A @ x + B @ u
        inputs.append(u)
        outputs.append(C @ x)
    return np.array(inputs), np.array(outputs)


def test_design_flags_the_limits_the_unconstrained_law_breaks_for_the_nominal_step(client):
    body = {k: request()[k] for k in ("model", "horizons", "weights")}
    body["limits"] = {"move_max": [0.05, None], "output_max": [None, 0.5], "nominal_step": [1.0, 1.0]}
    answer = post(client, body, path="/design").json()
    check = answer["limit_check"]
    inputs, outputs = nominal_by_hand(answer["gain"], np.array([1.0, 1.0]), 30)
    moves = np.diff(np.vstack([np.zeros(2), inputs]), axis=0)
    assert check["violated"] is True and check["steps"] == 30 and check["nominal_step"] == [1.0, 1.0]
    found = {(v["kind"], v["side"], v["signal"]): v for v in check["violations"]}
    worst = found["move", "max", "steam"]
    assert worst["step"] == int(np.argmax(moves[:, 0])) and worst["limit"] == 0.05
    assert worst["value"] == pytest.approx(moves[:, 0].max(), rel=1e-9)
    if outputs[:, 1].max() > 0.5:
        level = found["output", "max", "level"]
        assert level["step"] == int(np.argmax(outputs[:, 1])) + 1  # outputs z(1) .. z(Hp)
        assert level["value"] == pytest.approx(outputs[:, 1].max(), rel=1e-9)
    assert all(v["kind"] != "input" for v in check["violations"])
    assert any(w["code"] == "unconstrained_law_breaks_limits" for w in answer["warnings"])

    body["limits"] = {"move_max": [1e3, 1e3], "input_min": [-1e3, -1e3], "output_max": [1e3, 1e3]}
    wide = post(client, body, path="/design").json()
    assert wide["limit_check"] == {"violated": False, "violations": [], "nominal_step": [1.0, 1.0], "steps": 30}
    assert not any(w["code"] == "unconstrained_law_breaks_limits" for w in wide["warnings"])
    del body["limits"]
    assert post(client, body, path="/design").json()["limit_check"] is None


# --------------------------------------------------------------------------- bad input

BAD = [
    ({"input_min": [0.0, 0.5], "input_max": [1.0, 0.2]}, "/limits/input_max/1", "below its input_min"),
    ({"output_min": [2.0, None], "output_max": [1.0, None]}, "/limits/output_max/0", "below its output_min"),
    ({"move_max": [0.0, None]}, "/limits/move_max/0", "above 0"),
    ({"move_max": [0.1, -1.0]}, "/limits/move_max/1", "above 0"),
    ({"input_min": [0.0, 0.0, 0.0]}, "/limits/input_min", "expected 2"),
    ({"output_max": [1.0]}, "/limits/output_max", "expected 2"),
    ({"nominal_step": [1.0]}, "/limits/nominal_step", "expected 2"),
    ({"output_softness": -1.0}, "/limits/output_softness", "greater than or equal to 0"),
    ({"output_softness": 1e13}, "/limits/output_softness", "less than or equal to"),
    ({"input_max": [1e308, None]}, "/limits/input_max/0", "too large for its span"),
    ({"input_min": ["low", None]}, "/limits/input_min/0", ""),
    ({"move_limit": [1.0, 1.0]}, "/limits/move_limit", "unknown field"),
]


@pytest.mark.parametrize(("limits", "where", "says"), BAD, ids=[b[1] + ":" + b[2] for b in BAD])
@pytest.mark.parametrize("path", ["/simulate", "/design"])
def test_bad_limits_are_a_422_naming_the_field(client, limits, where, says, path):
    body = request(steps=10, limits=limits)
    body["model"]["inputs"][0]["span"] = 1e-5  # makes 1e308 overflow once scaled
    if path == "/design":
        body = {k: body[k] for k in ("model", "horizons", "weights", "limits")}
    found = problems(client, body, path)
    assert where in found, found
    assert says in found[where]


def test_an_initial_input_outside_its_limits_is_refused_unless_clamping_is_asked(client):
    limits = {"input_min": [-1.0, 0.0], "input_max": [1.0, 0.5]}
    body = request(steps=20, limits=limits, initial={"input": [0.5, 0.8]})
    found = problems(client, body)
    assert list(found) == ["/scenario/initial/input/1"]
    assert "above its input_max 0.5" in found["/scenario/initial/input/1"]
    # The default initial input (zeros) is held against the limits too.
    body = request(steps=20, limits={"input_min": [0.2, None]})
    found = problems(client, body)
    assert "/scenario/initial/input" in found and "by default 0" in found["/scenario/initial/input"]
    # Asked to clamp: the run starts from the clipped input, and a warning says so.
    body = request(
        steps=20,
        limits={**limits, "clamp_initial_input": True, "move_max": [0.05, 0.05]},
        initial={"input": [0.5, 0.8]},
    )
    answer = post(client, body).json()
    warning = next(w for w in answer["warnings"] if w["code"] == "initial_input_clamped")
    assert "outlet" in warning["message"] and "0.5" in warning["message"]
    first_move = np.subtract(answer["inputs"][0], [0.5, 0.5])
    assert np.all(np.abs(first_move) <= 0.05 + TOL)  # from the clipped u(-1) = [0.5, 0.5]


def test_the_qp_work_cap_refuses_long_runs_under_limits(make_client):
    client = make_client(max_simulation_work=150_000_000)
    body = request(steps=1000, limits={"move_max": [0.1, 0.1]})
    found = problems(client, body)
    assert "QP" in found["/scenario/steps"]
    del body["limits"]
    assert client.post("/simulate", json=body).status_code == 200  # the same run without limits fits


def test_the_default_softness_is_the_solver_s():
    from service.schemas.limits import LimitsRequest

    assert LimitsRequest().output_softness == DEFAULT_OUTPUT_SOFTNESS


def test_a_measured_disturbance_beyond_the_valves_moves_the_target_and_is_said(client):
    # A measured inlet flow (invented: a step of 12 kg/h into the vessel) whose rejection
    # alone needs more steam than the valve has.  The steady state under it is x_s =
    # (I - A)^-1 (B u + Bd d_m) (common practice), and the nearest reachable one in the weighted
    # sense is min |W S_z^-1 (G_ss u + G_m d_m - r)| subject to the input limits, by
    # scipy.optimize.lsq_linear (the reference).  Before the flow step the setpoint is reachable;
    # after it the run must settle on the reference and report the corrected target.
    low, high = np.array([-0.5, -0.3]), np.array([0.5, 0.3])
    bd = np.array([[0.004], [0.0], [0.0015], [0.0]])
    r = np.array([0.8, -0.2])
    body = request(
        steps=700,
        kind="output_disturbance",
        limits={"input_min": low.tolist(), "input_max": high.tolist()},
        setpoint_changes=[{"step": 5, "setpoint": r.tolist()}],
        measured_disturbances=[{"step": 300, "value": [12.0]}],
    )
    body["model"]["b_disturbance"] = bd.tolist()
    body["model"]["disturbances"] = [{"name": "inlet_flow", "unit": "kg/h", "span": 10.0}]
    gain = steady_gain()
    g_m = C @ np.linalg.solve(np.eye(A.shape[0]) - A, bd)
    weight = np.diag(np.sqrt(np.array(EXAMPLE["weights"]["output"])) / OUTPUT_SPAN)
    before = np.linalg.solve(gain, r)
    assert np.all((before > low) & (before < high))  # reachable before the flow step
    reference = scipy.optimize.lsq_linear(
        weight @ gain, weight @ (r - g_m @ [12.0]), bounds=(low, high), method="bvls", tol=1e-14
    )
    assert reference.success and np.abs(reference.fun).max() > 1e-3  # out of reach after it
    answer = post(client, body).json()
    u, z = np.array(answer["inputs"]), np.array(answer["outputs"])
    np.testing.assert_allclose(z[295], r, atol=1e-6)
    np.testing.assert_allclose(u[-1], reference.x, atol=1e-7)
    np.testing.assert_allclose(z[-1], gain @ reference.x + g_m @ [12.0], atol=1e-7)
    rows = rows_by_step(answer)
    np.testing.assert_allclose(rows[699]["target"], gain @ reference.x + g_m @ [12.0], atol=1e-6)
    assert all(rows[k]["target"] is None for k in range(200, 300) if k in rows)
    assert any(w["code"] == "setpoint_out_of_reach" for w in answer["warnings"])
