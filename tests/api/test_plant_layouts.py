"""Practitioners' layouts through the HTTP layer: spare inputs, unweighted levels, integrating levels.

Invented plants in our own scenario (a column with two compositions and three inputs; a vessel
with a level).  Sources beside each check: the eigenvector facts of the incremental loop (see
tests/solver/test_marginal.py) and a bounded run (common practice).
"""

from __future__ import annotations

import copy

import numpy as np
import scipy.linalg

# Two compositions, three inputs (reflux, boil-up, feed preheat): one spare direction.
COLUMN = {
    "model": {
        "kind": "state_space",
        "a": [[0.9, 0.0], [0.0, 0.8]],
        "b": [[1.0, 0.5, 0.2], [0.0, 1.0, 0.3]],
        "c": [[1.0, 0.0], [0.0, 1.0]],
        "inputs": [{"name": "reflux"}, {"name": "boilup"}, {"name": "feed_preheat"}],
        "outputs": [{"name": "top_purity"}, {"name": "bottom_purity"}],
        "sample_time": 1.0,
    },
    "horizons": {"prediction": 20, "control": 3},
    "weights": {"output": [1.0, 1.0], "move": [0.1, 0.1, 0.1]},
}


def test_a_spare_input_is_a_named_marginal_mode_not_an_unstable_loop(client):
    body = client.post("/design", json=COLUMN).json()
    loop = body["closed_loop"]
    assert loop["stable"] is False
    (mode,) = loop["marginal_modes"]
    assert mode["cause"] == "free_input_direction"
    assert mode["signals"] == ["reflux", "boilup", "feed_preheat"]
    assert abs(complex(mode["pole"]["real"], mode["pole"]["imag"]) - 1.0) < 1e-6
    codes = [w["code"] for w in body["warnings"]]
    assert "unstable_closed_loop" not in codes and codes.count("free_input_direction") == 1
    advice = next(w for w in body["warnings"] if w["code"] == "free_input_direction")["message"]
    assert "weights.input" in advice and "raise the move weights" not in advice


def test_the_spare_direction_is_in_the_inputs_own_units_whatever_their_spans(client):
    # The same column in engineering units with spans (reflux in t/h, boil-up in MW, preheat in
    # kW, invented), and written without spans with the weights divided by the spans squared:
    # one controller, so one spare direction.  Reference: the null space of the engineering
    # steady-state gain C (I - A)^-1 B (numpy, scipy.linalg.null_space), largest entry 1.
    spans_in, spans_out = np.array([2.0, 20.0, 50.0]), np.array([0.05, 0.02])
    with_spans = copy.deepcopy(COLUMN)
    for signal, span in zip(with_spans["model"]["inputs"], spans_in, strict=True):
        signal["span"] = float(span)
    for signal, span in zip(with_spans["model"]["outputs"], spans_out, strict=True):
        signal["span"] = float(span)
    without = copy.deepcopy(COLUMN)
    without["weights"] = {
        "output": (np.array(COLUMN["weights"]["output"]) / spans_out**2).tolist(),
        "move": (np.array(COLUMN["weights"]["move"]) / spans_in**2).tolist(),
    }
    a, b, c = (np.array(COLUMN["model"][k]) for k in ("a", "b", "c"))
    null = scipy.linalg.null_space(c @ np.linalg.solve(np.eye(2) - a, b))[:, 0]
    null = null / null[np.argmax(np.abs(null))]
    directions = []
    for body in (with_spans, without):
        answer = client.post("/design", json=body).json()
        (mode,) = answer["closed_loop"]["marginal_modes"]
        assert mode["cause"] == "free_input_direction"
        directions.append(np.array(mode["direction"]))
        gain = np.array(answer["plant"]["steady_state_gain"]["values"])
        assert np.abs(gain @ directions[-1]).max() < 1e-9 * np.abs(gain).max()
        advice = next(w for w in answer["warnings"] if w["code"] == "free_input_direction")["message"]
        assert f"{null[0]:+.3g} reflux" in advice
    assert np.allclose(directions[0], null, rtol=1e-9, atol=1e-12)
    assert np.allclose(directions[1], null, rtol=1e-9, atol=1e-12)


def test_a_spare_input_with_dead_times_and_wide_spans_is_still_a_free_direction(client):
    # An invented reactor: two outputs, three inputs of very different sizes (coolant in m3/h,
    # feed in kg/h, catalyst as a fraction), first-order elements with 5-10 samples of dead
    # time.  Whether the pole at z = 1 is a free input direction must not depend on the spans
    # (it was called a tuning pole with them; found in an independent audit).  Reference: the
    # null space of the element gains, the steady-state gain of a transfer matrix
    # (scipy.linalg.null_space), largest entry 1.
    def element(gain, tau, delay):
        return {"gain": gain, "time_constants": [tau], "dead_time": delay}

    gains = [[-0.9, 0.004, 900.0], [-0.35, -0.0015, 1500.0]]
    shapes = [[(14.0, 6.0), (20.0, 8.0), (10.0, 5.0)], [(25.0, 9.0), (18.0, 7.5), (12.0, 10.0)]]
    body = {
        "model": {
            "kind": "transfer_matrix",
            "sample_time": 1.0,
            "elements": [
                [element(g, *shape) for g, shape in zip(*row, strict=True)] for row in zip(gains, shapes, strict=True)
            ],
            "inputs": [
                {"name": "coolant_flow", "unit": "m3/h", "span": 20.0},
                {"name": "feed_rate", "unit": "kg/h", "span": 4000.0},
                {"name": "catalyst_fraction", "unit": "1", "span": 0.01},
            ],
            "outputs": [
                {"name": "reactor_temperature", "unit": "degC", "span": 10.0},
                {"name": "conversion", "unit": "%", "span": 5.0},
            ],
        },
        "horizons": {"prediction": 60, "control": 8},
        "weights": {"output": [1.0, 1.0], "move": [0.1, 0.2, 0.1]},
    }
    plain = copy.deepcopy(body)
    for signal in plain["model"]["inputs"] + plain["model"]["outputs"]:
        signal.pop("span")
    null = scipy.linalg.null_space(np.array(gains))[:, 0]
    null = null / null[np.argmax(np.abs(null))]
    for request in (body, plain):
        answer = client.post("/design", json=request).json()
        (mode,) = answer["closed_loop"]["marginal_modes"]
        assert mode["cause"] == "free_input_direction", mode
        codes = [w["code"] for w in answer["warnings"]]
        assert "free_input_direction" in codes and "marginal_pole" not in codes
        np.testing.assert_allclose(mode["direction"], null, rtol=1e-6, atol=1e-9)


def test_a_spare_input_run_stays_bounded_and_is_not_called_unstable(client):
    request = copy.deepcopy(COLUMN)
    request["scenario"] = {"steps": 200, "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}]}
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    codes = [w["code"] for w in body["warnings"]]
    assert "whole_loop_unstable" not in codes and body["diverged_at"] is None
    assert [m["cause"] for m in body["whole_loop"]["marginal_modes"]] == ["free_input_direction"]
    outputs = np.array(body["outputs"])
    assert np.all(np.abs(outputs) < 10.0)
    assert np.allclose(outputs[-1], [1.0, -0.5], atol=1e-6)  # the setpoints are still met


def _transfer_example_with_gain_error(factor):
    from service.pipeline.examples import load_example

    request = load_example("design_request_transfer_matrix.json")
    true = copy.deepcopy(request["model"])
    for row in true["elements"]:
        for element in row:
            if element is not None:
                element["gain"] *= factor
    return request, true


def test_the_default_estimator_is_offset_free_on_the_transfer_matrix_example(client):
    # The bundled example has an integrating level: output_disturbance is undetectable there
    # (Pannocchia and Rawlings 2003), the default per-output model is not.
    request, true = _transfer_example_with_gain_error(1.2)  # a true plant with 20 % gain error
    request["scenario"] = {
        "steps": 400,
        "setpoint_changes": [{"step": 5, "setpoint": [1.0, 5.0]}],
        "input_disturbances": [{"step": 150, "value": [2.0, -1.0]}],
        "true_plant": true,
    }
    response = client.post("/simulate", json=request)
    assert response.status_code == 200, response.text
    body = response.json()
    assert body["estimator"]["kind"] == "per_output"
    assert body["estimator"]["disturbances"] == ["output", "rate"]
    assert body["columns"]["estimates"][-2:] == [
        "vessel_temperature.output_disturbance",
        "vessel_level.rate_disturbance",
    ]
    # Offset-free under 20 % gain error and an unmeasured step: the last output equals the setpoint.
    np.testing.assert_allclose(body["outputs"][-1], [1.0, 5.0], atol=1e-6)
    explicit = copy.deepcopy(request)
    explicit["estimator"] = {"kind": "output_disturbance"}
    problem = client.post("/simulate", json=explicit).json()
    assert "per_output" in problem["errors"][0]["detail"]


def test_a_rate_bias_on_a_self_regulating_output_is_a_422_naming_it(client):
    from service.pipeline.examples import load_example

    request = load_example("design_request_transfer_matrix.json")
    request["estimator"] = {"disturbances": ["rate", "rate"]}
    request["scenario"] = {"steps": 5}
    response = client.post("/simulate", json=request)
    assert response.status_code == 422
    (error,) = response.json()["errors"]
    assert error["pointer"] == "/estimator/disturbances/0" and "vessel_temperature" in error["detail"]


def _vessel(true_b_factor=None, steps=300):
    from service.pipeline.examples import load_example

    request = load_example("simulate_request.json")
    request["scenario"] = {"steps": steps, "setpoint_changes": [{"step": 5, "setpoint": [1.0, -0.5]}]}
    if true_b_factor is not None:
        true = copy.deepcopy(request["model"])
        true["b"] = (np.array(true["b"]) * np.array(true_b_factor)).tolist()
        request["scenario"]["true_plant"] = true
    return request


def test_a_true_plant_with_a_flipped_gain_sign_is_flagged_as_diverging(client):
    # The steam valve's effect reversed on the true plant: positive feedback through the law.
    body = client.post("/simulate", json=_vessel([[-1.0, 1.0]] * 4)).json()
    codes = [w["code"] for w in body["warnings"]]
    assert body["whole_loop"]["stable"] is True  # the model's own loop is fine ...
    assert body["true_loop"]["stable"] is False and body["true_loop"]["spectral_radius"] > 1.0
    assert "true_loop_unstable" in codes and body["diverged_at"] is not None
    # diverged_at is where the run left 1000 times the scenario's size (a setpoint of 1) while growing.
    outputs = np.abs(np.array(body["outputs"][: body["diverged_at"] + 1]))
    assert outputs[-1].max() > 1e3 or np.abs(np.array(body["inputs"][body["diverged_at"]])).max() > 1e3


def test_the_true_loop_advice_detunes_only_around_a_stable_model(client):
    # Detuning (heavier move weights) is the usual remedy for model error around a stable plant
    # (common practice); around an open-loop unstable one it brings a finite-horizon law nearer
    # to the unstable open loop, so it is not advised there.  An invented exothermic reactor
    # (temperature pole 1.04 per sample) with its coolant's sign flipped on the true plant.
    stable = client.post("/simulate", json=_vessel([[-1.0, 1.0]] * 4)).json()
    advice = next(w["message"] for w in stable["warnings"] if w["code"] == "true_loop_unstable")
    assert "raise the move weights" in advice
    reactor = {
        "model": {
            "kind": "state_space",
            "a": [[1.04, 0.1], [0.0, 0.8]],
            "b": [[0.0], [0.5]],
            "c": [[1.0, 0.0]],
            "sample_time": 1.0,
        },
        "horizons": {"prediction": 40, "control": 5},
        "weights": {"output": [1.0], "move": [1.0]},
    }
    run = copy.deepcopy(reactor)
    true = copy.deepcopy(reactor["model"])
    true["b"] = [[0.0], [-0.5]]
    run["scenario"] = {"steps": 60, "true_plant": true}
    body = client.post("/simulate", json=run).json()
    assert body["whole_loop"]["stable"] is True and body["true_loop"]["stable"] is False
    advice = next(w["message"] for w in body["warnings"] if w["code"] == "true_loop_unstable")
    assert "raise the move weights" not in advice and "lengthen the horizons" in advice


def test_the_true_loop_equals_the_whole_loop_on_the_model_and_is_stable_with_20_percent_gain_error(client):
    same = client.post("/simulate", json=_vessel([[1.0, 1.0]] * 4)).json()
    poles = np.sort_complex(np.array([complex(p["real"], p["imag"]) for p in same["true_loop"]["poles"]]))
    whole = np.sort_complex(np.array([complex(p["real"], p["imag"]) for p in same["whole_loop"]["poles"]]))
    np.testing.assert_allclose(poles, whole, atol=1e-9)  # the same matrix when the true plant is the model
    error = client.post("/simulate", json=_vessel([[1.2, 1.2]] * 4)).json()
    assert error["true_loop"]["stable"] is True and error["diverged_at"] is None
    np.testing.assert_allclose(error["outputs"][-1], [1.0, -0.5], atol=1e-6)  # offset-free under the error
