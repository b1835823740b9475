"""The analyses of /design with measured outputs of their own: the robustness block and the model-error study.

The plant is the heater and vessel of tests/api/test_measured_outputs.py (invented): the
controlled inlet temperature is not measured, the outlet temperature is.

References, each independent of the service's own frequency and model-error code:

- python-control (``control``): the plant and the controller exported by /design/export as
  ``control.ss`` systems, the loop closed with ``control.feedback``, its margins from
  ``control.stability_margins`` and its frequency responses evaluated by python-control; the
  loop broken at the plant input ``L_i = -K P`` and at the sensors ``L_o = -P K`` with
  ``S = (I + L)^-1``, ``T = I - S`` (common practice);
- with a measured feed-through ``D_m``: the controller from the sensor ``u = K0 (y - D_m u)``
  as python-control's ``feedback(K0, D_m)``, K0 the law exported for the model without it
  (neither filter nor design depends on ``D_m``), and the true sensor
  ``f z^-d (C_m (zI - A)^-1 B + D_m)`` built from ``control.tf`` and ``control.ss``;
- /simulate's ``true_loop`` on a true plant written out by hand: the model's gain times the
  factor and the extra dead time as a shift register on the heater (its own realization), the
  true plant's sensor reading the true states.
"""

from __future__ import annotations

import copy

import control
import numpy as np
import pytest

from tests.api.test_measured_outputs import CM, CZ, A, B, _body

POINTS = 150


def _design_fields(body):
    return {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator")}


def _post(client, path, body):
    r = client.post(path, json=body)
    assert r.status_code == 200, r.text
    return r.json()


def _two_sensors(body):
    """The outlet temperature and a second sensor on the heated stream, mixed with the outlet."""
    for model in (body["model"], body["scenario"]["true_plant"]):
        model["c_measured"] = [[0.0, 1.0], [0.6, 0.4]]
        model["measured"] = [{"name": "outlet_temp", "unit": "degC"}, {"name": "mixed_temp", "unit": "degC"}]
    body["estimator"]["measurement_noise"] = [0.1, 0.05]
    return body


def _systems(client, body):
    """The plant u -> y_m and the exported law y_m -> u as python-control systems (setpoint held at zero)."""
    fields = _design_fields(body)
    law = _post(client, "/design/export", {**fields, "format": "state_space"})
    measured = [i for i, s in enumerate(law["inputs"]) if s["role"] == "measured"]
    rows = [i for i, s in enumerate(law["outputs"]) if s["role"] == "input"]
    a, b, c, d = (np.array(law[k]["values"], dtype=float) for k in "abcd")
    ts = law["sample_time"]
    controller = control.ss(a, b[:, measured], c[rows], d[np.ix_(rows, measured)], ts)
    cm = np.array(body["model"]["c_measured"], dtype=float)
    plant = control.ss(A, B, cm, np.zeros((cm.shape[0], 1)), ts)
    return plant, controller, ts


def _response(system, w, ts):
    """The frequency response of a python-control system at ``w``: shape (N, outputs, inputs)."""
    value = np.array([np.atleast_2d(system(np.exp(1j * x * ts))) for x in w])
    return value.reshape(len(w), system.noutputs, system.ninputs)


def _sigma_max(system, w, ts):
    return np.linalg.svd(_response(system, w, ts), compute_uv=False)[:, 0]


def _check_loop(report, loop, size, ts, grid):
    """The service's S and T of one break point against python-control's ``feedback`` of the same loop."""
    eye = control.ss([], [], [], np.eye(size), ts)
    s = control.feedback(eye, loop)  # (I + L)^-1
    t = control.feedback(loop, eye)  # L (I + L)^-1
    for name, system in (("sensitivity", s), ("complementary", t)):
        peak, where = report[f"peak_{name}"], report[f"peak_{name}_frequency"]
        # the peak is python-control's sigma_max(S) at the reported frequency, and no frequency of a
        # dense grid (python-control's own evaluation) exceeds it
        assert _sigma_max(system, [where], ts)[0] == pytest.approx(peak, rel=1e-9)
        dense = np.logspace(np.log10(grid[0]), np.log10(np.pi / ts), 4000)
        assert _sigma_max(system, dense, ts).max() <= peak * (1 + 1e-9)
        np.testing.assert_allclose(
            report[name]["largest"], _sigma_max(system, grid, ts), rtol=1e-9, atol=1e-12, err_msg=name
        )
    return s


def _robustness(client, body):
    fields = _design_fields(body)
    fields["analysis"] = {"frequency": True, "points": POINTS}
    rb = _post(client, "/design", fields)["robustness"]
    return rb, np.array(rb["frequencies"])


def _check_margins(margins, loop):
    """The service's single-loop margins against python-control's ``stability_margins``; the gain margin."""
    gm, pm, _, wpc, wgc, _ = control.stability_margins(loop)
    assert margins["gain_margin"] == pytest.approx(gm, rel=1e-6)
    assert margins["phase_margin"] == pytest.approx(pm, rel=1e-6)
    assert margins["gain_crossover_frequency"] == pytest.approx(wgc, rel=1e-6)
    assert margins["phase_crossover_frequency"] == pytest.approx(wpc, rel=1e-6)
    return gm


def test_robustness_with_one_sensor_equals_python_control(client):
    body = _body()
    rb, grid = _robustness(client, body)
    plant, controller, ts = _systems(client, body)
    assert rb["plant_output_signals"] == ["outlet_temp"]  # the loop broken at the sensor
    # u = K y (the sign of negative feedback inside K): the loop of the classical tools is -K P
    at_input, at_output = -controller * plant, -plant * controller
    _check_loop(rb["plant_input"], at_input, 1, ts, grid)
    _check_loop(rb["plant_output"], at_output, 1, ts, grid)
    _check_margins(rb["plant_input"]["margins"], at_input)
    # the closed loop of plant and law (positive feedback: the law carries its own sign)
    closed = control.feedback(plant, controller, sign=1)
    assert rb["spectral_radius"] == pytest.approx(np.abs(closed.poles()).max(), rel=1e-9)
    assert rb["stable"]


def test_robustness_with_two_sensors_breaks_the_output_loop_at_the_sensors(client):
    body = _two_sensors(_body())
    rb, grid = _robustness(client, body)
    plant, controller, ts = _systems(client, body)
    assert rb["plant_output_signals"] == ["outlet_temp", "mixed_temp"]
    _check_loop(rb["plant_input"], -controller * plant, 1, ts, grid)
    s_out = _check_loop(rb["plant_output"], -plant * controller, 2, ts, grid)
    assert rb["plant_output"]["margins"] is None and rb["plant_input"]["margins"] is not None
    # two singular values at the sensors (2 x 2), one at the heater: the break points differ
    smallest = np.linalg.svd(_response(s_out, grid, ts), compute_uv=False)[:, -1]
    np.testing.assert_allclose(rb["plant_output"]["sensitivity"]["smallest"], smallest, rtol=1e-9, atol=1e-12)
    assert rb["plant_output"]["sensitivity"]["smallest"] != rb["plant_output"]["sensitivity"]["largest"]


def test_robustness_with_a_measured_feed_through_equals_python_control(client):
    # The law reads y - D_m u of its own command u.  Neither the filter nor the design depends on
    # D_m (tests/solver/test_estimation.py), so the law on the corrected measurement is the one
    # exported for the model without it, K0, and the controller from the sensor is
    # u = K0 (y - D_m u): python-control's feedback(K0, D_m) = K0 (I + D_m K0)^-1.
    dm = np.array([[0.2]])
    body = _body(d_measured=dm.tolist())
    rb, grid = _robustness(client, body)
    k0_plant, k0, ts = _systems(client, _body())
    controller = control.feedback(k0, control.ss([], [], [], dm, ts))
    plant = control.ss(A, B, CM, dm, ts)
    at_input, at_output = -controller * plant, -plant * controller
    _check_loop(rb["plant_input"], at_input, 1, ts, grid)
    _check_loop(rb["plant_output"], at_output, 1, ts, grid)
    gm = _check_margins(rb["plant_input"]["margins"], at_input)
    # the feed-through changes the loop broken at the plant input (the law's correction uses its
    # own command, the plant's feed-through the injected one)
    plain = control.stability_margins(-k0 * k0_plant)
    assert abs(plain[0] - gm) > 1e-3 * gm
    # closed again, the correction cancels the feed-through: the loop's poles are those of the
    # loop without it, and of /simulate's whole loop (the separation principle, common practice)
    closed = control.feedback(plant, controller, sign=1)
    assert rb["spectral_radius"] == pytest.approx(np.abs(closed.poles()).max(), rel=1e-9)
    run = copy.deepcopy(body)
    run["scenario"] = {"steps": 5}
    whole = _post(client, "/simulate", run)["whole_loop"]
    assert rb["spectral_radius"] == pytest.approx(whole["spectral_radius"], rel=1e-8)


# --------------------------------------------------------------------------- model error


def _true_plant(factor: float, extra: int):
    """The model with the heater's gain times ``factor`` and ``extra`` samples more dead time on it.

    States ``[x1, x2, u(k-1), ..., u(k-extra)]``; the true sensor reads the true ``x2``.
    """
    n, r = 2, extra
    a = np.zeros((n + r, n + r))
    a[:n, :n] = A
    b = np.zeros((n + r, 1))
    if r:
        a[:n, n + r - 1 :] = factor * B  # x(k+1) = A x + f B u(k - extra)
        b[n] = 1.0
        for i in range(1, r):
            a[n + i, n + i - 1] = 1.0
    else:
        b[:n] = factor * B
    pad = np.zeros((1, r))
    return {
        "kind": "state_space",
        "a": a.tolist(),
        "b": b.tolist(),
        "c": np.hstack([CZ, pad]).tolist(),
        "c_measured": np.hstack([CM, pad]).tolist(),
        "inputs": [{"name": "heater", "unit": "kW"}],
        "outputs": [{"name": "inlet_temp", "unit": "degC"}],
        "measured": [{"name": "outlet_temp", "unit": "degC"}],
        "sample_time": 1.0,
    }


@pytest.mark.parametrize("estimator", ["kalman", "default"])
def test_each_model_error_case_equals_simulates_true_loop_through_the_sensor(client, estimator):
    body = _body(noise=False)
    if estimator == "default":
        del body["estimator"]  # per_output: a bias on the measured outlet temperature
    factors, extra = [0.5, 1.0, 1.5, 3.0, 6.0], [0, 2]
    fields = {k: copy.deepcopy(body[k]) for k in ("model", "horizons", "weights", "estimator") if k in body}
    fields["analysis"] = {"model_error": {"gain_factors": factors, "extra_dead_time": extra}}
    report = _post(client, "/design", fields)["model_error"]
    assert [(c["gain_factor"], c["extra_dead_time"]) for c in report["cases"]] == [
        (f, d) for d in extra for f in factors
    ]
    verdicts = set()
    for case in report["cases"]:
        run = copy.deepcopy(body)
        run["scenario"] = {"steps": 5, "true_plant": _true_plant(case["gain_factor"], case["extra_dead_time"])}
        theirs = _post(client, "/simulate", run)["true_loop"]
        assert case["spectral_radius"] == pytest.approx(theirs["spectral_radius"], rel=1e-6), case
        assert (case["verdict"] == "stable") == theirs["stable"]
        verdicts.add(case["verdict"])
    if estimator == "kalman":  # its gain margin is below 2 at the plant input: the study tells the cases apart
        assert "stable" in verdicts and "unstable" in verdicts
    nominal = next(c for c in report["cases"] if c["gain_factor"] == 1.0 and c["extra_dead_time"] == 0)
    run = copy.deepcopy(body)
    run["scenario"] = {"steps": 5}
    whole = _post(client, "/simulate", run)["whole_loop"]
    assert nominal["spectral_radius"] == pytest.approx(whole["spectral_radius"], rel=1e-6)


def test_the_model_error_study_with_a_measured_feed_through_equals_python_control(client):
    # /simulate takes a true plant with the model's own d_measured only, so the reference here is
    # python-control: the true sensor f z^-d (C_m (zI - A)^-1 B + D_m), its feed-through scaled and
    # delayed with the rest, closed with the controller from the sensor u = K0 (y - D_m u) of the
    # model (feedback(K0, D_m), as in the robustness test above) by control.feedback.
    dm = np.array([[0.2]])
    body = _body(d_measured=dm.tolist(), noise=False)
    factors, extra = [0.5, 1.0, 1.5, 3.0, 6.0], [0, 2]
    fields = _design_fields(body)
    fields["analysis"] = {"model_error": {"gain_factors": factors, "extra_dead_time": extra}}
    report = _post(client, "/design", fields)["model_error"]
    _, k0, ts = _systems(client, _body())
    controller = control.feedback(k0, control.ss([], [], [], dm, ts))
    sensor = control.ss(A, B, CM, dm, ts)
    verdicts = set()
    for case in report["cases"]:
        delay = control.ss(control.tf([1.0], [1.0] + [0.0] * case["extra_dead_time"], ts))
        true = case["gain_factor"] * (sensor * delay)
        closed = control.feedback(true, controller, sign=1)
        radius = np.abs(closed.poles()).max()
        assert case["spectral_radius"] == pytest.approx(radius, rel=1e-6), case
        verdicts.add(case["verdict"])
    assert "stable" in verdicts and "unstable" in verdicts
    # the nominal case is /simulate's whole loop (the estimator cancels the model's own D_m)
    nominal = next(c for c in report["cases"] if c["gain_factor"] == 1.0 and c["extra_dead_time"] == 0)
    run = copy.deepcopy(body)
    run["scenario"] = {"steps": 5}
    whole = _post(client, "/simulate", run)["whole_loop"]
    assert nominal["spectral_radius"] == pytest.approx(whole["spectral_radius"], rel=1e-6)
    # the feed-through's gain error counts: without D_m the perturbed loops differ
    plain = _design_fields(_body(noise=False))
    plain["analysis"] = fields["analysis"]
    other = _post(client, "/design", plain)["model_error"]["cases"]
    moved = [abs(a["spectral_radius"] - b["spectral_radius"]) for a, b in zip(report["cases"], other, strict=True)]
    assert max(moved) > 1e-3


def test_the_comparison_names_the_sensors_its_output_loop_is_broken_at(client):
    # A comparison of two tunings of the plant with a sensor of its own: its robustness block and
    # its summary name the loop at the plant output by the sensor's tag, as /design does.
    old = _design_fields(_body())
    new = copy.deepcopy(old)
    new["weights"]["move"] = [2.0 * w for w in new["weights"]["move"]]
    answer = _post(client, "/design/compare", {"in_service": old, "proposed": new, "robustness": True})
    alone = _post(client, "/design", {**old, "analysis": {"frequency": True}})
    signals = alone["robustness"]["plant_output_signals"]
    assert signals != [s["name"] for s in alone["plant"]["outputs"]]  # the sensor, not the controlled output
    assert answer["robustness"]["plant_output_signals"] == [signals, signals]
    where = f"plant output (at {', '.join(signals)})"
    assert any(where in line for line in answer["summary"]), answer["summary"]
