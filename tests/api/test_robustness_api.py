"""The robustness block of POST /design: the loop in frequency with the request's estimator.

Sources named beside each check: the hand-computed first-order loop of
tests/solver/test_frequency.py (the solver's own reference for the margins); the change of
units behind scaling (common practice); Bode's sensitivity integral in discrete time (a
textbook formula); S + T = I with the triangle inequality (linear algebra); the separation
principle (common practice); the 6 dB rule of thumb for the peak sensitivity (common practice).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from service.solver.design.controller import design_controller
from service.solver.estimation.estimator import design_estimator
from service.solver.estimation.realization import controller_system, plant_system
from service.solver.evaluation.frequency import frequency_analysis

#: The first-order plant P(z) = b/(z - a) of tests/solver/test_frequency.py (a = 0.5, b = 1),
#: here sampled every 0.5 time units, with spans on both signals.
A, B, C, TS = 0.5, 1.0, 1.0, 0.5
SU, SZ = 4.0, 2.0
Q, R = 1.0, 0.2


def siso_request(*, spans: bool = True, **extra):
    body = {
        "model": {"kind": "state_space", "a": [[A]], "b": [[B]], "c": [[C]], "sample_time": TS},
        "horizons": {"prediction": 10, "control": 3},
        "weights": {"output": [Q], "move": [R]},
        "analysis": {"frequency": True, "points": 150},
    }
    if spans:
        body["model"]["inputs"] = [{"name": "valve", "span": SU}]
        body["model"]["outputs"] = [{"name": "flow", "span": SZ}]
    body.update(extra)
    return body


def design(client, body):
    r = client.post("/design", json=body)
    assert r.status_code == 200, r.text
    return r.json()


def with_frequency(example, points=120, **estimator):
    body = copy.deepcopy(example)
    body["analysis"] = {"frequency": True, "points": points}
    if estimator:
        body["estimator"] = estimator
    return body


def test_single_loop_block_equals_the_solver_on_the_scaled_model(client):
    # The design and its estimator live in scaled signals: u = SU u_s and z = SZ z_s give
    # B_s = B SU and C_s = C / SZ (a change of units).  The solver analysed on that model by
    # hand must give the very numbers of the response.
    rb = design(client, siso_request())["robustness"]
    b_s, c_s = np.array([[B * SU]]), np.array([[C / SZ]])
    a = np.array([[A]])
    ctrl = design_controller(a, b_s, c_s, output_weight=[Q], move_weight=[R], prediction=10, control=3)
    est = design_estimator(a, b_s, c_s, kind="output_disturbance")
    fa = frequency_analysis(plant_system(a, b_s, c_s), controller_system(ctrl, est), sample_time=TS, points=150)
    np.testing.assert_allclose(rb["frequencies"], fa.frequencies, rtol=1e-14)
    assert rb["nyquist_frequency"] == pytest.approx(np.pi / TS, rel=1e-15)
    for name, loop in (("plant_input", fa.plant_input), ("plant_output", fa.plant_output)):
        got, m = rb[name], loop.margins
        assert got["margins"]["gain_margin"] == pytest.approx(m.gain_margin, rel=1e-9)
        assert got["margins"]["phase_margin"] == pytest.approx(m.phase_margin, rel=1e-9)
        assert got["margins"]["gain_crossover_frequency"] == pytest.approx(m.gain_crossover_frequency, rel=1e-9)
        assert got["margins"]["phase_crossover_frequency"] == pytest.approx(m.phase_crossover_frequency, rel=1e-9)
        assert got["peak_sensitivity"] == pytest.approx(loop.peak_sensitivity, rel=1e-9)
        assert got["peak_complementary"] == pytest.approx(loop.peak_complementary, rel=1e-9)
        assert got["bandwidth"] == pytest.approx(loop.bandwidth, rel=1e-9)
        np.testing.assert_allclose(got["sensitivity"]["largest"], loop.sensitivity_singular_values[:, 0], rtol=1e-9)
        # A single loop: one singular value, |S| itself.
        assert got["sensitivity"]["largest"] == got["sensitivity"]["smallest"]
    # The default estimator is per_output (issue 10): on this self-regulating loop an output bias.
    assert rb["estimator"] == {
        "kind": "per_output",
        "disturbance": "per_output",
        "disturbances": ["output"],
        "spectral_radius": pytest.approx(est.spectral_radius, rel=1e-9),
    }
    assert rb["stable"] is True


def test_single_loop_margins_do_not_depend_on_the_spans(client):
    # Change of units: the spanned design with weights q, r is the unspanned design with
    # q / SZ^2, r / SU^2. The default estimator is the same filter either way: its covariances
    # are in the signals' sizes (spans, or natural sizes without them), and for one loop only
    # their ratios count, which are the same in both. So the loop L = -K P is the same, and so
    # are its margins and |S|.
    spanned = design(client, siso_request())["robustness"]
    plain_body = siso_request(spans=False)
    plain_body["weights"] = {"output": [Q / SZ**2], "move": [R / SU**2]}
    plain = design(client, plain_body)["robustness"]
    for name in ("plant_input", "plant_output"):
        for key in ("gain_margin", "phase_margin", "gain_crossover_frequency", "phase_crossover_frequency"):
            assert plain[name]["margins"][key] == pytest.approx(spanned[name]["margins"][key], rel=1e-7), key
        np.testing.assert_allclose(
            plain[name]["sensitivity"]["largest"], spanned[name]["sensitivity"]["largest"], rtol=1e-7
        )


def test_multivariable_peaks_bandwidth_and_grid(client, example):
    body = design(client, with_frequency(example, points=120))
    rb = body["robustness"]
    assert len(rb["frequencies"]) == 120 and rb["frequencies"][-1] == pytest.approx(np.pi / 1.0)
    assert np.all(np.diff(rb["frequencies"]) > 0)
    for name in ("plant_input", "plant_output"):
        loop = rb[name]
        assert loop["margins"] is None  # a 2 x 2 loop has no classical margins
        s_max, s_min = np.array(loop["sensitivity"]["largest"]), np.array(loop["sensitivity"]["smallest"])
        t_max, t_min = np.array(loop["complementary"]["largest"]), np.array(loop["complementary"]["smallest"])
        assert s_max.shape == s_min.shape == t_max.shape == (120,)
        assert np.all(s_min <= s_max) and np.all(t_min <= t_max)
        # Bode's sensitivity integral in discrete time: with a strictly proper loop and no
        # open-loop pole outside the unit circle the mean of ln|det S| over frequency is
        # zero, so |det S| >= 1 somewhere and the peak of the largest singular value is >= 1.
        assert loop["peak_sensitivity"] >= 1.0
        # The peaks are maxima over frequency, at least every grid value (definition).
        assert loop["peak_sensitivity"] >= s_max.max() and loop["peak_complementary"] >= t_max.max()
        assert loop["peak_sensitivity_db"] == pytest.approx(20 * np.log10(loop["peak_sensitivity"]), rel=1e-12)
        # S + T = I and the triangle inequality: |sigma_max(S) - sigma_max(T)| <= 1.
        assert np.all(np.abs(s_max - t_max) <= 1.0 + 1e-9)
        # The offset-free estimator gives integral action: T -> I and S -> 0 at low frequency.
        assert t_max[0] == pytest.approx(1.0, abs=1e-3) and s_max[0] < 1e-2
        assert loop["peak_complementary"] >= 1.0 - 1e-6
        assert 0.0 < loop["bandwidth"] < rb["nyquist_frequency"]
    assert rb["stable"] is True and rb["spectral_radius"] < 1.0


def test_the_default_estimator_and_loop_are_those_of_simulate(client, example):
    # Same default estimator as /simulate; the loop's poles are the whole loop's poles of
    # /simulate (plant, controller, estimator; separation principle).
    rb = design(client, with_frequency(example, points=20))["robustness"]
    body = with_frequency(example, points=20)
    body["scenario"] = {"steps": 5}
    run = client.post("/simulate", json=body).json()
    assert rb["estimator"]["kind"] == run["estimator"]["kind"] == "per_output"  # the default (issue 10)
    assert rb["estimator"]["spectral_radius"] == pytest.approx(run["estimator"]["spectral_radius"], rel=1e-12)
    assert rb["spectral_radius"] == pytest.approx(run["whole_loop"]["spectral_radius"], rel=1e-7)
    assert rb["stable"] == run["whole_loop"]["stable"]
    # The design block of /simulate is the /design answer, robustness included.
    assert run["design"]["robustness"] == rb


def test_an_estimator_given_changes_the_loop(client, example):
    default = design(client, with_frequency(example, points=20))["robustness"]
    full = design(client, with_frequency(example, points=20, kind="full_state"))["robustness"]
    # disturbances: the per-output model field added by issue 10 (null for other kinds)
    assert full["estimator"] == {
        "kind": "full_state",
        "disturbance": "none",
        "disturbances": None,
        "spectral_radius": 0.0,
    }
    assert full["plant_input"]["peak_sensitivity"] != default["plant_input"]["peak_sensitivity"]


def test_no_robustness_unless_asked(client, example):
    assert design(client, example)["robustness"] is None
    example["analysis"] = {"frequency": False, "points": 50}
    assert design(client, example)["robustness"] is None


@pytest.mark.parametrize("points", [9, 2001, 0, -5, 2.5, "200", True, None])
def test_bad_points_are_refused_naming_the_field(client, example, points):
    body = with_frequency(example)
    body["analysis"]["points"] = points
    r = client.post("/design", json=body)
    assert r.status_code == 422, r.text
    assert [e["pointer"] for e in r.json()["errors"]] == ["/analysis/points"]


def test_points_beyond_the_work_cap_are_refused_naming_the_field(make_client, example):
    client = make_client(max_frequency_work=1_000_000)
    r = client.post("/design", json=with_frequency(example, points=2000))
    assert r.status_code == 422 and [e["pointer"] for e in r.json()["errors"]] == ["/analysis/points"]
    assert "at most" in r.json()["errors"][0]["detail"]
    assert client.post("/design", json=example).status_code == 200  # no analysis, no cap


def test_a_bad_estimator_is_refused_on_design(client, example):
    example["estimator"] = {"kind": "kalman", "measurement_noise": [1.0, 1.0, 1.0]}
    r = client.post("/design", json=example)
    assert r.status_code == 422 and "/estimator/measurement_noise" in [e["pointer"] for e in r.json()["errors"]]


def test_other_measured_outputs_break_the_output_loop_at_the_sensors(client, example):
    # python-control checks of this loop: tests/api/test_measured_analysis.py
    plain = design(client, with_frequency(example))["robustness"]
    assert plain["plant_output_signals"] == ["z1", "z2"]  # the default tags of the controlled outputs
    example["model"]["c_measured"] = [[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]]
    rb = design(client, with_frequency(example))["robustness"]
    assert rb["plant_output_signals"] == ["y1", "y2", "y3"]
    assert rb["plant_input"]["peak_sensitivity"] != plain["plant_input"]["peak_sensitivity"]
    full = design(client, with_frequency(example, kind="full_state"))["robustness"]
    assert full["plant_output_signals"] == ["x1", "x2", "x3", "x4"]


def test_high_peak_sensitivity_warns_for_an_aggressive_tuning_only(client, example):
    # Rule of thumb (common practice): a peak sensitivity above 2 (6 dB) is fragile.
    def codes(move):
        body = with_frequency(example, points=200, kind="full_state")
        body["weights"]["move"] = [move, move]
        answer = design(client, body)
        peak = max(answer["robustness"][k]["peak_sensitivity"] for k in ("plant_input", "plant_output"))
        return [w["code"] for w in answer["warnings"]], peak

    aggressive, high = codes(1e-4)
    sluggish, low = codes(10.0)
    assert high > 2.0 and aggressive.count("high_peak_sensitivity") == 1
    assert low < 2.0 and "high_peak_sensitivity" not in sluggish
    # Without the analysis there is nothing to warn from.
    example["weights"]["move"] = [1e-4, 1e-4]
    example["estimator"] = {"kind": "full_state"}
    assert "high_peak_sensitivity" not in [w["code"] for w in design(client, example)["warnings"]]


def test_the_robustness_example_answers_a_robustness_block(client):
    from service.pipeline.examples import load_example

    body = design(client, load_example("design_request_robustness.json"))
    assert len(body["robustness"]["frequencies"]) == 200 and body["robustness"]["stable"] is True
