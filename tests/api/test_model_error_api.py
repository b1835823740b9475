"""POST /design with analysis.model_error: the loop on the model with scaled gains and longer dead times.

Reference: /simulate's ``true_loop`` on a ``true_plant`` written out by hand as the same
transfer matrix with every gain multiplied by the factor and every dead time lengthened by the
extra samples (its own realization, built by the transfer-matrix conversion), so that both
routes meet only in the controller and estimator designed on the model. Our own scenario
(invented numbers): a 2 x 2 column with a composition and an integrating level, dead times.
"""

from __future__ import annotations

import copy

import pytest

TS = 1.0


def _elements(factor: float = 1.0, extra: int = 0):
    def element(gain, time_constants=None, dead_time=0.0, integrating=False):
        out = {"gain": gain * factor, "dead_time": dead_time + extra * TS, "integrating": integrating}
        if time_constants:
            out["time_constants"] = time_constants
        return out

    return [
        [element(0.8, [12.0], 2.0), element(-0.4, [8.0], 1.0)],
        [element(0.05, integrating=True), element(-0.04, integrating=True, dead_time=1.0)],
    ]


def _request(**analysis):
    return {
        "model": {
            "kind": "transfer_matrix",
            "elements": _elements(),
            "sample_time": TS,
            "inputs": [{"name": "reflux", "unit": "t/h", "span": 10.0}, {"name": "steam", "unit": "t/h", "span": 5.0}],
            "outputs": [{"name": "purity", "unit": "%", "span": 2.0}, {"name": "level", "unit": "%", "span": 50.0}],
        },
        "horizons": {"prediction": 40, "control": 4},
        "weights": {"output": [1.0, 0.5], "move": [0.5, 0.5]},
        "analysis": analysis,
    }


def test_each_case_equals_simulates_true_loop_on_the_perturbed_plant(client):
    factors, extra = [0.5, 1.0, 1.2, 2.0, 4.0], [0, 3]
    response = client.post("/design", json=_request(model_error={"gain_factors": factors, "extra_dead_time": extra}))
    assert response.status_code == 200, response.text
    report = response.json()["model_error"]
    assert report["estimator"] == "per_output" and report["tolerance"] == 1e-6
    assert [(c["gain_factor"], c["extra_dead_time"]) for c in report["cases"]] == [
        (f, d) for d in extra for f in factors
    ]
    for case in report["cases"]:
        body = _request()
        del body["analysis"]
        true_plant = copy.deepcopy(body["model"])
        true_plant["elements"] = _elements(case["gain_factor"], case["extra_dead_time"])
        body["scenario"] = {"steps": 5, "true_plant": true_plant}
        run = client.post("/simulate", json=body)
        assert run.status_code == 200, run.text
        theirs = run.json()["true_loop"]
        assert case["spectral_radius"] == pytest.approx(theirs["spectral_radius"], rel=1e-6), case
        assert (case["verdict"] == "stable") == theirs["stable"]
    nominal = report["cases"][1]
    assert nominal["gain_factor"] == 1.0 and nominal["verdict"] == "stable"
    assert nominal["spectral_radius"] == pytest.approx(
        client.post("/simulate", json={**_request(), "scenario": {"steps": 5}}).json()["whole_loop"]["spectral_radius"],
        rel=1e-6,
    )
    for band in report["stable_ranges"]:
        row = [c for c in report["cases"] if c["extra_dead_time"] == band["extra_dead_time"]]
        low, high = band["lowest_stable_factor"], band["highest_stable_factor"]
        assert low is not None and low <= 1.0 <= high
        assert all(c["verdict"] == "stable" for c in row if low <= c["gain_factor"] <= high)
        above = [c for c in row if c["gain_factor"] > high]
        assert not above or above[0]["verdict"] != "stable"


def test_the_default_study_and_what_it_leaves_out(client):
    response = client.post("/design", json=_request(model_error={}))
    assert response.status_code == 200, response.text
    report = response.json()["model_error"]
    assert [c["gain_factor"] for c in report["cases"]] == [0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0]
    assert {c["extra_dead_time"] for c in report["cases"]} == {0}
    assert client.post("/design", json=_request()).json()["model_error"] is None


def _problem(response):
    assert response.status_code == 422, response.text
    return {e["pointer"]: e["detail"] for e in response.json()["errors"]}


def test_too_many_cases_are_refused_naming_the_field(make_client):
    client = make_client(max_model_error_cases=3)
    body = _request(model_error={"gain_factors": [0.5, 2.0], "extra_dead_time": [0, 1]})
    errors = _problem(client.post("/design", json=body))
    assert "4 loops" in errors["/analysis/model_error/gain_factors"]


def test_too_much_work_is_refused_naming_the_field(make_client):
    client = make_client(max_model_error_work=1_000)
    errors = _problem(client.post("/design", json=_request(model_error={"gain_factors": [2.0]})))
    assert "floating-point operations" in errors["/analysis/model_error/gain_factors"]


def test_bad_factors_and_dead_times_are_refused(client):
    errors = _problem(client.post("/design", json=_request(model_error={"gain_factors": [1.0, 0.0]})))
    assert "/analysis/model_error/gain_factors/1" in errors
    errors = _problem(client.post("/design", json=_request(model_error={"extra_dead_time": [0, -1]})))
    assert "/analysis/model_error/extra_dead_time/1" in errors
    body = _request(model_error={"extra_dead_time": [0, 2]})
    body["estimator"] = {"kind": "full_state"}
    errors = _problem(client.post("/design", json=body))
    assert "full_state" in errors["/analysis/model_error/extra_dead_time/1"]
    errors = _problem(client.post("/design", json=_request(model_error={"extra_dead_time": [100_000]})))
    assert "states" in errors["/analysis/model_error/extra_dead_time/0"]
